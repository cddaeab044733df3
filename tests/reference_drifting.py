"""The drifting-grating analysis as it was before it was restructured for speed (issue 17), kept
only as the reference that ``tests/test_speed_same_numbers.py`` compares :func:`map2d.gratings.analyze_drifting`
with: same seeds, same numbers. Not used by map2d.

The functions below are the former ``analyze_drifting``, ``drifting_latency``, ``_spike_f1``,
``_dsi_bootstrap`` (one cell at a time) and ``_f1_f0_bootstrap`` (one quantile per cell), and the former
spike binning (``searchsorted`` of every spike of the session, ``cell_index`` by search); the helpers
that did not change are taken from :mod:`map2d.gratings`.
"""
# ruff: noqa
from __future__ import annotations

import numpy as np
from scipy import sparse, stats

from map2d.align import interval_responses as _interval_responses
from map2d.contract import GratingTable, Spikes, Traces
from map2d.gratings import (N_SPLITS, DriftingResult, _ROUND, _condition_f1_var, _cross_validated_f1_f0,
                            _f1_and_ratio, _fold_layout, _fold_sums, _group_sums, _grouped_anova, _index,
                            _nanmean, _per_tau, _per_tau_spont, _rate_difference_p, _split_folds, _subset,
                            _trace_f1, _welch_p, estimate_decay_tau, flashed_rows)


def cell_index(spikes):
    """The former row search: ``searchsorted`` of every spike's cell id (a subtraction for consecutive ids)."""
    ids = spikes.cell_ids
    if ids.size and ids[-1] - ids[0] == ids.size - 1:
        return spikes.cell - ids[0]
    return np.searchsorted(ids, spikes.cell)


def interval_responses(responses, starts_s, ends_s):
    """The former spike rates: every spike searched among the interval starts, one ``add.at``."""
    if not isinstance(responses, Spikes):
        return _interval_responses(responses, starts_s, ends_s)
    starts, ends = np.asarray(starts_s, float), np.asarray(ends_s, float)
    t = responses.time_s
    n_cells, n = responses.cell_ids.size, starts.size
    out = np.zeros((n_cells, n), dtype=np.float32)
    if n == 0 or t.size == 0:
        return out
    k = np.searchsorted(starts, t, side="right") - 1
    ok = k >= 0
    ok[ok] &= t[ok] < ends[k[ok]]
    k = k[ok]
    rate = (1.0 / (ends - starts)).astype(np.float32)
    np.add.at(out.reshape(-1), cell_index(responses)[ok] * n + k, rate[k])
    return out


def _window_levels(responses, start, stop, tau_s):
    if isinstance(responses, Spikes) or not (np.isfinite(tau_s) and tau_s > 0):
        return interval_responses(responses, start, stop).astype(float)
    from map2d.gratings import _window_levels as levels
    return levels(responses, start, stop, tau_s)


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


def _spike_f1(spikes: Spikes, onset, end, tf):
    n_cells, n = spikes.cell_ids.size, onset.size
    out = np.zeros((n_cells, n), dtype=complex)
    t = spikes.time_s
    if t.size == 0 or n == 0:
        return out
    k = np.searchsorted(onset, t, side="right") - 1
    ok = k >= 0
    ok[ok] &= t[ok] < end[k[ok]]
    k = k[ok]
    theta = 2 * np.pi * tf[k] * (t[ok] - onset[k])
    idx = cell_index(spikes)[ok] * n + k
    re = np.bincount(idx, weights=np.cos(theta), minlength=n_cells * n)
    im = np.bincount(idx, weights=-np.sin(theta), minlength=n_cells * n)
    return ((re + 1j * im).reshape(n_cells, n)) * (2.0 / (end - onset))[None, :]


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
        if given is None or given.ndim == 1 and not np.isfinite(given).all():
            nxt = np.append(stim_onset[1:], np.inf)
            session_tau = estimate_decay_tau(responses, table.offset_s[rows], nxt)
        else:
            session_tau = float("nan")
        if given is None:
            cell_tau = np.full(responses.values.shape[0], session_tau)
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
            t_m = responses.time_s - lat[cell_index(responses)]
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
    pref_dir = np.full(n_cells, np.nan)
    dsi = np.full(n_cells, np.nan)
    dsi_lo, dsi_hi = np.full(n_cells, np.nan), np.full(n_cells, np.nan)
    rng_boot = np.random.default_rng(rng)
    for c in np.flatnonzero(ok):
        curve = resp4[c, :, pref_idx[c, 1], pref_idx[c, 2]]
        if not np.isfinite(curve).any():
            continue
        i = int(np.nanargmax(curve))
        pref_dir[c] = dirs[i]
        opp = np.flatnonzero(np.abs(np.mod(dirs - dirs[i] - 180.0 + 180.0, 360.0) - 180.0) < 1e-6)
        if opp.size and np.isfinite(curve[opp[0]]) and curve[i] > 0:
            rn = max(float(curve[opp[0]]), 0.0)
            dsi[c] = (curve[i] - rn) / (curve[i] + rn)
            st = pref_idx[c, 1] * n_t + pref_idx[c, 2]
            dsi_lo[c], dsi_hi[c] = _dsi_bootstrap(trial_f0[c], trial_f1[c], cond, i * n_s * n_t + st,
                                                  int(opp[0]) * n_s * n_t + st, bool(simple[c]), dsi[c],
                                                  int(n_boot), rng_boot)

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
        order = np.argsort(cell, kind="stable")
        cell, k, u = cell[order], k[order], u[order]
        col = group[k] * n_bins + np.minimum(np.floor(u / step_s + 1e-6).astype(int), n_bins - 1)
        e1 = np.exp(-2j * np.pi * tf[k] * u) * phase_ref[k]
        for i in range(0, n_cells, block):
            lo, up = np.searchsorted(cell, [i, i + block])
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


def _dsi_bootstrap(f0, f1, cond, pref, opp, use_f1, estimate, n_boot, rng, level=0.95):
    """95 % interval of the DSI, resampling the trials of the preferred and the opposite direction.

    Each resample recomputes both responses as the point estimate does (mean F0, or the noise-bias-
    corrected F1 for a cell whose preferred response is modulated) and the DSI with the opposite
    response clipped at 0; the interval is the union of the percentile and the basic bootstrap
    intervals (conservative, as for the circular variance; Davison & Hinkley 1997, sec. 5.2), clipped
    to [0, 1]. NaN with fewer than 3 trials on a side or ``n_boot = 0``."""
    if n_boot <= 0 or not np.isfinite(estimate):
        return np.nan, np.nan
    rs = []
    for k in (pref, opp):
        idx = np.flatnonzero(cond == k)
        a0, a1 = f0[idx], f1[idx]
        ok = np.isfinite(a0) & np.isfinite(a1)
        a0, a1 = a0[ok], a1[ok]
        n = a0.size
        if n < 3:
            return np.nan, np.nan
        pick = rng.integers(0, n, (n_boot, n))
        if use_f1:
            z = a1[pick]
            v = (z.real.var(axis=1, ddof=1) + z.imag.var(axis=1, ddof=1)) / n
            rs.append(np.sqrt(np.maximum(np.abs(z.mean(axis=1)) ** 2 - v, 0.0)))
        else:
            rs.append(a0[pick].mean(axis=1))
    rp, rn = rs[0], np.maximum(rs[1], 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        d = np.where(rp > 0, (rp - rn) / (rp + rn), np.nan)
    d = d[np.isfinite(d)]
    if d.size < n_boot // 2:
        return np.nan, np.nan
    a = (1.0 - level) / 2.0
    q_lo, q_hi = np.quantile(d, [a, 1.0 - a])
    lo, hi = min(q_lo, 2 * estimate - q_hi), max(q_hi, 2 * estimate - q_lo)
    return float(min(max(lo, 0.0), 1.0)), float(min(max(hi, 0.0), 1.0))


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
    for c in np.flatnonzero((~np.isnan(r)).sum(axis=0) >= max(1, n_boot // 2)):
        rc = r[~np.isnan(r[:, c]), c]
        lo[c], hi[c] = np.quantile(rc, [a, 1.0 - a], method="inverted_cdf")   # no interpolation: inf allowed
        p[c] = float(np.mean(rc <= 1.0))
    return lo, hi, p
