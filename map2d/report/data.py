"""What the page draws, as small arrays: the per-cell data of ``report.html`` and the session's summary.

The report draws every figure in the browser (:file:`page.js`) from the arrays built here, so a
session of hundreds of cells costs tens of milliseconds per cell to write instead of a matplotlib
figure per cell. Arrays of more than a few values (maps, surfaces) are quantised to 16-bit integers
against their largest magnitude (relative error below ``1 / 32000`` of that magnitude, far under the
noise of any map) and base64-encoded; ``-32768`` marks a missing value (NaN). Curves are JSON numbers
rounded to 4 significant digits; missing values are ``null``.

Error bars of the flashed-grating tuning curves
-----------------------------------------------
The tuning curves are the curves ``cells.csv`` is fitted to (:func:`map2d.report.figures._tuning_curves`):
the response ``R = m + c |H|`` (``m`` the phase-averaged response, ``H`` the first harmonic over phase,
``c`` the contrast, lags pooled) summarised by its rank-1 orientation and SF profiles, or averaged over
the orientations nearest the preference. The noise variance of ``H`` per condition is measured from
single presentations (``Analysis.measured_noise``, :func:`map2d.analysis.flashed_noise`). With phases
spread evenly over the cycle, a least-squares fit of ``a0 + a1 cos + a2 sin`` has ``var a0 = var a1 / 2
= var a2 / 2`` (error propagation through the linear estimator; Bevington & Robinson, Data
Reduction and Error Analysis, quoted from memory), so ``var m = c^2 E|dH|^2 / 4`` and ``var (c |H|) ~ c^2 E|dH|^2 / 2``
(the component along ``H``), and ``var R ~ 3/4 c^2 E|dH|^2``; when the analysis measured the variance of
``m`` itself (``FlashedResult.phase_mean_noise_var``) that replaces ``c^2 E|dH|^2 / 4``. The rank-1
profiles' standard errors are
their spread over 200 noisy copies of the surface (parametric bootstrap, seeded); the average of the
rows nearest the preference, a fixed weighted sum, has the variance ``sum w^2 var R / (sum w)^2``.
Drifting-grating curves use the standard errors over trials (``f0_sem``, ``f1_sem``).
"""

from __future__ import annotations

import base64
import json
import math

import numpy as np

from . import figures as F

__all__ = ["pack", "cell_payloads", "session_payload", "index_columns", "INDEX_COLUMNS", "retinotopy"]

_QMAX = 32000
_MISSING = -32768


# ----------------------------------------------------------------------------------------------
# encoding
# ----------------------------------------------------------------------------------------------
def _r(v, digits=4):
    """A float as a JSON number with ``digits`` significant digits (None for NaN / inf / None)."""
    if v is None:
        return None
    try:
        f = float(v)
    except (TypeError, ValueError):
        return None
    if not math.isfinite(f):
        return None
    return float(f"{f:.{digits}g}")


def _list(a, digits=4):
    return [_r(v, digits) for v in np.asarray(a, float).ravel()]


def pack(a) -> dict:
    """``{"m": scale, "sh": shape, "q": base64 of little-endian int16}``; value = q / 32000 * m.

    Examples
    --------
    >>> p = pack([[1.0, -0.5], [float("nan"), 0.0]])
    >>> p["m"], p["sh"]
    (1.0, [2, 2])
    >>> np.frombuffer(base64.b64decode(p["q"]), "<i2").tolist()
    [32000, -16000, -32768, 0]
    """
    a = np.asarray(a, float)
    fin = np.isfinite(a)
    m = float(np.max(np.abs(a[fin]))) if fin.any() else 0.0
    m = m if m > 0 else 1.0
    q = np.where(fin, np.round(np.where(fin, a, 0.0) / m * _QMAX), _MISSING).astype("<i2")
    return {"m": float(f"{m:.6g}"), "sh": list(a.shape), "q": base64.b64encode(q.tobytes()).decode("ascii")}


# ----------------------------------------------------------------------------------------------
# the index
# ----------------------------------------------------------------------------------------------
#: Columns of the cell index: (cells.csv column, heading, kind, short meaning). Kind: "int", "num"
#: (shown with 3 significant digits), "bool" (yes/no) or "text".
INDEX_COLUMNS = (
    ("cell", "cell", "int", "cell id"),
    ("responsive", "map", "bool", "significant sparse-noise map"),
    ("grating_responsive", "gratings", "bool", "significant response to gratings"),
    ("polarity", "polarity", "text", "map polarity"),
    ("center_x_deg", "azimuth", "num", "receptive-field centre, azimuth (deg)"),
    ("center_y_deg", "elevation", "num", "receptive-field centre, elevation (deg)"),
    ("size_deg", "size", "num", "receptive-field size (deg)"),
    ("pref_orientation_deg", "ori", "num", "preferred orientation (deg, 0-180)"),
    ("pref_sf_cpd", "SF", "num", "preferred spatial frequency (cycles/deg)"),
    ("f1_f0", "F1/F0", "num", "modulation ratio of the drifting-grating response"),
    ("agreement", "agreement", "num", "map-grating agreement (fraction of variance)"),
    ("linear", "linear", "bool", "linearity call (empty: no call)"),
    ("map_reliability", "reliability", "num", "split-half reliability of the space-time map"),
    ("prediction_r", "pred. r", "num", "cross-validated LN-model prediction correlation"),
    ("st_separability", "separability", "num", "space-time separability (noise-corrected)"),
)


def _column_help(names):
    """Meaning of each column from the column dictionary (:mod:`map2d.columns`); {} without it."""
    try:
        from ..columns import meaning
    except ImportError:
        return {}
    return {n: meaning(n) for n in names if meaning(n)}


def index_columns(analysis):
    """The index's columns ``[(column, heading, kind, hover text)]`` (all of :data:`INDEX_COLUMNS`;
    a column the table lacks is shown empty)."""
    help_ = _column_help([c for c, *_ in INDEX_COLUMNS])
    return [(c, h, k, help_.get(c, text) + f" (column {c})") for c, h, k, text in INDEX_COLUMNS]


def index_values(analysis, columns):
    """``rows[r][j]``: the index value of cell row ``r``, column ``j`` (float, bool, str or None)."""
    n = len(analysis.cell_ids)
    cols = []
    for c, _, kind, _ in columns:
        if c == "cell":
            cols.append([int(v) for v in analysis.cell_ids])
        elif kind == "num":
            cols.append([_r(v, 6) for v in F.column_float(analysis, c)])
        elif kind == "bool":
            cols.append(F.column_bool(analysis, c))
        else:
            cols.append([t or None for t in F.column_text(analysis, c)])
    return [[col[r] for col in cols] for r in range(n)]


# ----------------------------------------------------------------------------------------------
# per cell
# ----------------------------------------------------------------------------------------------
def _outline_params(an, r):
    """``[cx, cy, semi-axis a, semi-axis b, angle deg]`` of the 1-s.d. outline (figures module notes)."""
    model = F._vtext(an, "model", r)
    cx, cy = F._vfloat(an, "center_x_deg", r), F._vfloat(an, "center_y_deg", r)
    if not (math.isfinite(cx) and math.isfinite(cy)):
        return None
    p = F._shape_params(an, model, r)
    if not p or not all(math.isfinite(v) for v in p):
        return [_r(cx), _r(cy), None, None, None]
    if model == "dog":
        s = p[0] / math.sqrt(2.0)
        return [_r(cx), _r(cy), _r(s), _r(s), 0.0]
    return [_r(cx), _r(cy), _r(p[0]), _r(p[1]), _r(p[2])]


def _response_variance(an):
    """``var R`` per cell and (orientation, SF), (C, O, S), or None (module notes): the measured noise
    variance of the phase-averaged part when the analysis has it (``phase_mean_noise_var``), else
    ``c^2 E|dH|^2 / 4``, plus ``c^2 E|dH|^2 / 2`` for ``c |H|``."""
    if an.measured_noise is None or an.flashed is None:
        return None
    noise = np.asarray(an.measured_noise, float)
    c2 = np.asarray(an.flashed.condition_contrast, float)[None] ** 2
    vm = getattr(an.flashed, "phase_mean_noise_var", None)
    vm = c2 * noise / 4.0 if vm is None else np.asarray(vm, float)
    return vm + c2 * noise / 2.0


def _flashed_variance(an, c):
    """``var R`` of flashed cell ``c`` (see :func:`_response_variance`), or None."""
    v = _response_variance(an)
    return None if v is None else v[c]


def _rank1_se(surface, var, n_draws=200, rng=0, chunk=64):
    """Standard errors of the two rank-1 profiles (:func:`map2d.fit.tuning._rank1`): their spread over
    ``n_draws`` copies of the surface with Gaussian noise of variance ``var`` added (parametric
    bootstrap; the profiles' scale depends on the noise too, so no fixed-weight formula holds at the peak).

    ``surface`` and ``var`` are ``(O, S)`` or, for many cells at once, ``(C, O, S)``; returns the
    orientation and SF standard errors, ``(O,)`` and ``(S,)`` (or ``(C, O)`` and ``(C, S)``).
    """
    surface, var = np.asarray(surface, float), np.asarray(var, float)
    if surface.ndim == 2:
        o, f = _rank1_se(surface[None], var[None], n_draws, rng, chunk)
        return o[0], f[0]
    g = np.random.default_rng(rng)
    n_c, n_o, n_s = surface.shape
    o_se, s_se = np.full((n_c, n_o), np.nan), np.full((n_c, n_s), np.nan)
    for lo in range(0, n_c, chunk):
        m = np.where(np.isfinite(surface[lo:lo + chunk]), surface[lo:lo + chunk], 0.0)
        known = np.isfinite(var[lo:lo + chunk]) & np.isfinite(surface[lo:lo + chunk])
        sd = np.sqrt(np.where(known, var[lo:lo + chunk], 0.0))
        draws = m[:, None] + g.standard_normal((m.shape[0], n_draws, n_o, n_s)) * sd[:, None]
        # leading singular vectors of every draw by power iteration from the clean surface's (the draws
        # are small perturbations of it; 8 iterations agree with a full SVD to ~1e-6 on tuned cells)
        _, _, vt = np.linalg.svd(m, full_matrices=False)
        v0 = np.repeat(vt[:, None, 0, :], n_draws, axis=1)
        for _ in range(8):
            u0 = np.einsum("cdos,cds->cdo", draws, v0)
            u0 /= np.maximum(np.sqrt((u0 * u0).sum(-1, keepdims=True)), 1e-300)
            v0 = np.einsum("cdos,cdo->cds", draws, u0)
            s0 = np.sqrt((v0 * v0).sum(-1))
            v0 /= np.maximum(s0[..., None], 1e-300)
        k = np.argmax(np.abs(u0), axis=-1)
        flip = np.where(np.take_along_axis(u0, k[..., None], -1)[..., 0] < 0, -1.0, 1.0)
        u0, v0 = u0 * flip[..., None], v0 * flip[..., None]
        o_prof = u0 * (s0 * v0.max(-1))[..., None]
        f_prof = v0 * (s0 * u0.max(-1))[..., None]
        oc, sc = o_prof.std(1, ddof=1), f_prof.std(1, ddof=1)
        oc[~known.any(2)] = np.nan
        sc[~known.any(1)] = np.nan
        o_se[lo:lo + chunk], s_se[lo:lo + chunk] = oc, sc
    return o_se, s_se


def _near_se(theta, var, pref, kappa):
    """Standard error of :func:`map2d.fit.tuning._sf_near` (three rows, von Mises weights)."""
    from ..fit import tuning as tu
    dist = np.abs(np.mod(theta - pref + 90.0, 180.0) - 90.0)
    near = np.argsort(dist)[:3]
    w = tu.von_mises_orientation(theta[near], 0.0, 1.0, kappa, pref)
    v = var[near]
    ok = np.isfinite(v)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.sqrt((np.where(ok, v, 0.0) * w[:, None] ** 2).sum(0)) / (ok * w[:, None]).sum(0)


def _drifting_se(dr, c):
    """Standard errors of the drifting orientation and SF curves (:func:`map2d.fit.tuning._drifting_curves`)."""
    d_i, s_i, t_i = dr.pref_index[c]
    sem = dr.f1_sem[c] if bool(dr.simple[c]) else dr.f0_sem[c]
    dir_se = np.asarray(sem[:, s_i, t_i], float)
    ori = np.mod(dr.directions_deg, 180.0)
    uo = np.unique(np.round(ori, 6))
    idx = np.searchsorted(uo, np.round(ori, 6))
    fin = np.isfinite(dir_se)
    ss = np.bincount(idx, weights=np.where(fin, dir_se ** 2, 0.0), minlength=uo.size)
    cnt = np.bincount(idx, weights=fin.astype(float), minlength=uo.size)
    with np.errstate(invalid="ignore", divide="ignore"):
        o_se = np.where(cnt > 0, np.sqrt(ss) / np.maximum(cnt, 1), np.nan)
    return o_se, np.asarray(sem[d_i, :, t_i], float)


def _tuning(an, r, flashed_se=None):
    got = F._tuning_curves(an, r)
    if got is None:
        return None
    src, th, oc, sfs, sc, surface, ofit = got
    o_se = s_se = None
    if src == "flashed":
        res = an.flashed
        k = int(np.flatnonzero(np.asarray(res.cell_ids) == int(an.cell_ids[r]))[0])
        var = _flashed_variance(an, k)
        if var is not None:
            o_se, s_se = flashed_se[0][k], flashed_se[1][k]
            if surface is not None and ofit is not None:
                s_se = _near_se(np.asarray(th, float), var, float(ofit.params[3]), float(ofit.params[2]))
    else:
        dr = an.drifting
        k = int(np.flatnonzero(np.asarray(dr.cell_ids) == int(an.cell_ids[r]))[0])
        o_se, s_se = _drifting_se(dr, k)
    p = F._ori_fit_params(an, r)
    fitted = F._vbool(an, "grating_responsive", r) is True
    out = {"src": src, "th": _list(th), "oc": _list(oc), "sf": _list(sfs), "sc": _list(sc),
           "ose": None if o_se is None else _list(o_se), "sse": None if s_se is None else _list(s_se),
           "vm": None if (p is None or not fitted) else _list(p, 6), "sig": fitted,
           "psf": _r(F._vfloat(an, "pref_sf_cpd", r)),
           "psf_ci": [_r(F._vfloat(an, "pref_sf_ci_low_cpd", r)), _r(F._vfloat(an, "pref_sf_ci_high_cpd", r))]}
    return out


def _map_part(an, r, pack_maps):
    m = an.maps
    li, significant = F._map_lag_index(m, r)
    # the time course at the cell's own field pixel (map2d.fit.spatial), else at the pixel of the fitted
    # centre, else at the largest |z| of the linear map
    g = m.grid
    fp = getattr(an, "fields", None)
    i = j = -1
    if fp is not None and fp.field_pixel[r, 0] >= 0:
        i, j = (int(v) for v in fp.field_pixel[r])
    else:
        cx, cy = F._vfloat(an, "center_x_deg", r), F._vfloat(an, "center_y_deg", r)
        if math.isfinite(cx) and math.isfinite(cy):
            j = int(round((cx - g.center_x_deg) / g.dx_deg + (g.nx - 1) / 2.0))
            i = int(round((g.ny - 1) / 2.0 - (cy - g.center_y_deg) / g.dy_deg))
    if not (0 <= i < g.ny and 0 <= j < g.nx):
        z = np.abs(np.nan_to_num(np.asarray(m.linear_z[r, li], float)))
        i, j = np.unravel_index(int(np.argmax(z)), z.shape)
    x, y = m.grid.point_of(i, j)
    tc = np.stack([np.asarray(a[r, :, i, j], float) for a in (m.on, m.off, m.linear)])
    out = {"li": li, "sig": bool(significant), "maps": pack_maps(r, li), "tc": [_list(t) for t in tc],
           "px": [_r(float(x)), _r(float(y))], "outline": _outline_params(an, r),
           "last": bool(significant and li == len(m.lags_s) - 1 and len(m.lags_s) > 1)}
    st = getattr(an, "space_time", None)                    # the x-t slice (map2d.spacetime)
    if st is not None and np.isfinite(st.slice_across[r]).any():
        sl = np.nan_to_num(np.asarray(st.slice_across[r], float))
        used = np.flatnonzero(np.any(sl != 0, axis=0))
        if used.size:
            a, b = max(used[0] - 1, 0), min(used[-1] + 2, sl.shape[1])
            out["st"] = {"s": pack(sl[::-1, a:b]), "pos": _list(st.slice_positions_deg[a:b]),
                         "ax": _r(st.axis_deg[r]), "sep": _r(st.separability[r]), "dir": _r(st.direction_deg[r])}
    return out


def _surface_part(an, r):
    fl = an.flashed
    cid = int(an.cell_ids[r])
    k = np.flatnonzero(np.asarray(fl.cell_ids) == cid)
    if k.size == 0:
        return None
    k = int(k[0])
    meas = np.abs(np.asarray(F._measured_h(an)[k]))
    out = {"pm": pack(np.asarray(fl.phase_mean_combined[k] if fl.phase_mean_combined is not None
                                 else fl.phase_mean_at_peak[k], float))}
    pred = None
    reason = ""
    if an.predicted_h is not None and an.maps is not None:
        ok_map = bool(an.maps.responsive[r])
        g = complex(an.forward["gain"][r]) if an.forward is not None else complex(np.nan)
        gain = abs(g)
        if not ok_map:
            reason = "no significant map to predict from"
        elif not (math.isfinite(gain) and gain > 0):
            reason = "no gain between map and gratings (no grating response)"
        else:                     # magnitudes: |gain| (a negative gain flips the sign, not |H|)
            pred = np.abs(np.asarray(an.predicted_h[r])) * gain
            out["gain"] = _r(gain)
            out["gain_negative"] = bool(g.imag == 0 and g.real < 0)
    both = np.stack([meas, pred if pred is not None else np.full(meas.shape, np.nan)])
    out["h"] = pack(both)
    out["has_pred"] = pred is not None
    out["pred_reason"] = reason
    e = np.sqrt(np.clip(np.asarray(fl.energy[k], float), 0, None))
    pl = int(fl.peak_lag_index[k])
    out["lag"] = {"e": _list(e), "peak": pl,
                  "last": bool(pl == e.size - 1 and e.size > 1 and bool(fl.responsive[k]))}
    bm = np.asarray(fl.blank_mean[k], float)
    out["blank"] = _r(bm[pl]) if 0 <= pl < bm.size else None
    if an.inverse is not None and an.maps is not None:
        inv = an.inverse
        a = np.asarray(inv.from_gratings[r], float)
        b = np.asarray(inv.from_map[r], float)
        out["inv"] = {"g": pack(a), "m": pack(b) if bool(an.maps.responsive[r]) else None,
                      "sim": _r(float(inv.similarity[r]))}
    return out


def cell_payloads(analysis):
    """``{cell id: JSON string}``: what the page needs to draw each cell's panel (see module notes)."""
    an = analysis
    n = len(an.cell_ids)
    pack_maps = None
    if an.maps is not None:
        m = an.maps

        def pack_maps(r, li):
            return pack(np.stack([m.on[r, li], m.off[r, li], m.linear[r, li]]).astype(float))
    has_g = an.flashed is not None or an.drifting is not None
    flashed_se = None
    var = _response_variance(an)
    if var is not None:                                   # all cells at once (module notes)
        flashed_se = _rank1_se(np.asarray(an.flashed.peak_response, float), var)
    out = {}
    for r in range(n):
        d = {}
        if an.maps is not None:
            d["map"] = _map_part(an, r, pack_maps)
        if an.flashed is not None:
            d["surf"] = _surface_part(an, r)
        if has_g:
            d["tun"] = _tuning(an, r, flashed_se)
        if an.size_disk is not None and an.size_radii_deg is not None:
            d["size"] = {"disk": _list(an.size_disk[r]), "ann": _list(an.size_annulus[r])}
        if an.drifting is not None:
            dr = an.drifting
            k = np.flatnonzero(np.asarray(dr.cell_ids) == int(an.cell_ids[r]))
            if k.size:
                d["spont"] = _r(float(dr.spontaneous[int(k[0])]))
        out[int(an.cell_ids[r])] = json.dumps(d, separators=(",", ":"), allow_nan=False)
    return out


# ----------------------------------------------------------------------------------------------
# the session
# ----------------------------------------------------------------------------------------------
def retinotopy(centroids_px, azimuth, elevation, cut=3.5, iterations=3):
    """Receptive-field position against ROI position: a plane fitted to each coordinate, outliers flagged.

    Each of azimuth and elevation is fitted as ``a + gx x + gy y`` over ROI centroids ``(x, y)`` by least
    squares, then refitted without the cells whose residual exceeds ``cut`` robust standard deviations
    (``1.4826 x`` the median absolute residual, the normal-consistent MAD; Rousseeuw & Croux 1993),
    ``iterations`` times. A cell is flagged when it is an outlier in either coordinate: its receptive
    field sits far from where its neighbours' map puts it, often a sign of neuropil contamination.

    Parameters
    ----------
    centroids_px : array (C, 2)  ROI centroids (x = column, y = row), NaN for cells without an ROI
    azimuth, elevation : array (C,)  receptive-field centres (deg), NaN where not estimated
    cut : float
    iterations : int

    Returns
    -------
    dict or None
        ``{"az": fit, "el": fit, "flag": (C,) bool}``; each fit ``{"coef": [a, gx, gy], "resid_sd": s,
        "n": n_used, "r2": R^2}``. None with fewer than 5 cells that have both an ROI and a centre.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> xy = rng.uniform(0, 100, (40, 2))
    >>> az = 1.0 + 0.2 * xy[:, 0] + rng.normal(0, 0.3, 40); az[3] += 15
    >>> el = -0.1 * xy[:, 1] + rng.normal(0, 0.3, 40)
    >>> out = retinotopy(xy, az, el)
    >>> np.flatnonzero(out["flag"]).tolist(), round(out["az"]["coef"][1], 1)
    ([3], 0.2)
    """
    xy = np.asarray(centroids_px, float)
    az, el = np.asarray(azimuth, float), np.asarray(elevation, float)
    ok = np.isfinite(xy).all(1) & np.isfinite(az) & np.isfinite(el)
    if ok.sum() < 5:
        return None
    X = np.column_stack([np.ones(len(az)), xy[:, 0], xy[:, 1]])
    flag = np.zeros(len(az), bool)
    fits = {}
    for name, v in (("az", az), ("el", el)):
        use = ok.copy()
        for _ in range(iterations + 1):
            coef, *_ = np.linalg.lstsq(X[use], v[use], rcond=None)
            res = v - X @ coef
            s = 1.4826 * float(np.median(np.abs(res[use])))
            s = s if s > 0 else float(np.std(res[use])) or 1e-12
            new = ok & (np.abs(res) <= cut * s)
            if new.sum() < 5 or np.array_equal(new, use):
                break
            use = new
        out = ok & (np.abs(res) > cut * s)
        flag |= out
        tot = float(np.sum((v[use] - v[use].mean()) ** 2))
        r2 = 1.0 - float(np.sum(res[use] ** 2)) / tot if tot > 0 else float("nan")
        fits[name] = {"coef": [float(c) for c in coef], "resid_sd": s, "n": int(use.sum()), "r2": r2,
                      "out": out}
    return {"az": fits["az"], "el": fits["el"], "flag": flag}


def _centroids(labels, cell_ids, offset):
    """ROI centroids ``(x, y)`` in pixels per cell (NaN for a cell without pixels)."""
    lab = np.asarray(labels).astype(np.int64)
    top = int(max(lab.max(), (np.max(cell_ids) + offset) if len(cell_ids) else 0)) + 1
    rows, cols = np.indices(lab.shape)
    cnt = np.bincount(lab.ravel(), minlength=top)
    sx = np.bincount(lab.ravel(), weights=cols.ravel().astype(float), minlength=top)
    sy = np.bincount(lab.ravel(), weights=rows.ravel().astype(float), minlength=top)
    idx = np.asarray(cell_ids, np.int64) + offset
    with np.errstate(invalid="ignore", divide="ignore"):
        x = np.where(cnt[idx] > 0, sx[idx] / cnt[idx], np.nan)
        y = np.where(cnt[idx] > 0, sy[idx] / cnt[idx], np.nan)
    return np.column_stack([x, y])


def _fov_part(an, session):
    labels = getattr(session, "rois", None) if session is not None else None
    if labels is None:
        return None
    lab = np.asarray(labels)
    if lab.ndim != 2 or lab.size == 0:
        return None
    offset = int(getattr(session, "roi_label_offset", 0) or 0)
    lab = lab.astype(np.int64)
    # labels as cell rows (+1; 0 = background or a label of no listed cell), 16 bits
    ids = np.asarray(an.cell_ids, np.int64)
    lut = np.zeros(int(max(lab.max(), (ids.max() + offset) if ids.size else 0)) + 1, np.int64)
    ok_ids = (ids + offset) >= 1
    lut[ids[ok_ids] + offset] = np.flatnonzero(ok_ids) + 1
    lut[0] = 0
    rowlab = lut[lab]
    if rowlab.max() >= 65535:
        return None
    cen = _centroids(lab, ids, offset)
    out = {"h": int(lab.shape[0]), "w": int(lab.shape[1]),
           "lab": base64.b64encode(rowlab.astype("<u2").tobytes()).decode("ascii"),
           "cx": _list(cen[:, 0]), "cy": _list(cen[:, 1])}
    ret = retinotopy(cen, F.column_float(an, "center_x_deg"), F.column_float(an, "center_y_deg"))
    if ret is not None:
        out["ret"] = {k: {"coef": _list(ret[k]["coef"], 6), "sd": _r(ret[k]["resid_sd"]), "n": ret[k]["n"],
                          "r2": _r(ret[k]["r2"])} for k in ("az", "el")}
        out["ret"]["flag"] = [int(v) for v in np.flatnonzero(ret["flag"])]
    return out


def session_payload(analysis, session=None) -> dict:
    """What every panel and summary shares: axes, units, per-cell summary columns, the field of view."""
    from ..reconcile import AGREEMENT_THRESHOLD, F1_F0_THRESHOLD, OVERLAP_THRESHOLD

    an = analysis
    from .colours import report_luts

    ranked, _ = F.select_cells(an, 1)
    first = int(an.cell_ids[ranked[0]]) if ranked else (int(an.cell_ids[0]) if len(an.cell_ids) else None)
    d = {"unit": an.unit, "ids": [int(v) for v in an.cell_ids], "first": first, "cmaps": report_luts(),
         "thr": {"agreement": AGREEMENT_THRESHOLD, "f1_f0": F1_F0_THRESHOLD, "overlap": OVERLAP_THRESHOLD}}
    if an.maps is not None:
        g = an.maps.grid
        d["grid"] = {"ext": [float(v) for v in g.extent_deg], "ny": int(g.ny), "nx": int(g.nx)}
        d["lags_ms"] = _list(1000.0 * np.asarray(an.maps.lags_s, float))
        d["outlines"] = [_outline_params(an, r) for r in range(len(an.cell_ids))]
    if an.flashed is not None:
        fl = an.flashed
        d["ori"] = _list(fl.orientations_deg)
        d["sfs"] = _list(fl.sfs_cpd)
        d["glags_ms"] = _list(1000.0 * np.asarray(fl.lags_s, float))
    tested = [np.asarray(res.sfs_cpd, float) for res in (an.flashed, an.drifting) if res is not None]
    d["tested_sfs"] = _list(np.unique(np.concatenate(tested))) if tested else []
    if an.size_radii_deg is not None:
        d["radii"] = _list(an.size_radii_deg)
    d["col"] = {}
    for c in ("pref_orientation_deg", "pref_sf_cpd", "agreement", "f1_f0", "onoff_overlap", "snr",
              "center_x_deg", "center_y_deg"):
        d["col"][c] = _list(F.column_float(an, c))
    d["col"]["linear"] = F.column_bool(an, "linear")
    d["col"]["responsive"] = F.column_bool(an, "responsive")
    d["col"]["grating_responsive"] = F.column_bool(an, "grating_responsive")
    d["col"]["linear_reason"] = F.column_text(an, "linear_reason")
    d["col"]["grating_class"] = F.column_text(an, "grating_class")
    fov = _fov_part(an, session)
    if fov is not None:
        d["fov"] = fov
    return d
