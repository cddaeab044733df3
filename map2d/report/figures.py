"""What the report's figures show, read from an analysis: table columns, which cell to show first,
receptive-field outlines, the tuning curves ``cells.csv`` is fitted to.

The figures themselves are drawn in the browser (:mod:`map2d.report.html`, :file:`page.js`) from the
arrays of :mod:`map2d.report.data`.

Conventions of the drawings
---------------------------
- Maps are drawn with row 0 at the top of the stimulus grid (contract) over
  :meth:`map2d.geometry.Grid.extent_deg`: x is azimuth and y is elevation in degrees.
- Signed maps use a diverging colour map centred on 0 with symmetric limits; magnitudes a sequential one
  (:mod:`map2d.report.colours`).
- Receptive-field outlines are the contour at ``exp(-1/2)`` of the fitted envelope's peak (1 s.d.):
  the Gaussian's ellipse (``sigma_major``, ``sigma_minor``, ``theta``), the Gabor's envelope
  (``sigma_u`` along the wave vector, ``sigma_v`` across) and, for the difference of Gaussians, the
  centre Gaussian ``exp(-r^2 / rc^2)``, i.e. a circle of radius ``rc / sqrt(2)``.
- Orientation x SF surfaces show ``|H|``, the magnitude of the first harmonic over phase per unit
  contrast; the predicted surface is multiplied by the least-squares gain of the forward agreement
  (:func:`map2d.reconcile.forward_agreement`) so that both are in the measured units, on one scale.
- Tuning curves are the curves ``cells.csv`` is fitted to; the orientation fit is drawn from the
  table's von Mises parameters, the SF preference from the table's value and interval.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["column_float", "column_text", "column_bool", "select_cells", "outline_patch"]

_SQRT2 = math.sqrt(2.0)


# ----------------------------------------------------------------------------------------------
# reading the cells table
# ----------------------------------------------------------------------------------------------
def _float_or_nan(v) -> float:
    if v is None or isinstance(v, str) and v.strip() == "":
        return float("nan")
    try:
        return float(v)
    except (TypeError, ValueError):
        return float("nan")


def _value(analysis, name, row):
    vals = analysis.cells.get(name)
    return None if vals is None or row >= len(vals) else vals[row]


def _vfloat(analysis, name, row) -> float:
    return _float_or_nan(_value(analysis, name, row))


def _vtext(analysis, name, row) -> str:
    v = _value(analysis, name, row)
    return "" if v is None or isinstance(v, float) and math.isnan(v) else str(v)


def _vbool(analysis, name, row):
    v = _value(analysis, name, row)
    if isinstance(v, (bool, np.bool_)):
        return bool(v)
    if isinstance(v, str) and v.strip().lower() in ("true", "false"):
        return v.strip().lower() == "true"
    return None


def column_float(analysis, name) -> np.ndarray:
    """Column ``name`` of ``analysis.cells`` as floats, NaN where empty or absent."""
    vals = analysis.cells.get(name)
    if vals is None:
        return np.full(len(analysis.cell_ids), np.nan)
    return np.array([_float_or_nan(v) for v in vals], float)


def column_text(analysis, name) -> list:
    """Column ``name`` as strings ('' where empty or absent)."""
    return [_vtext(analysis, name, r) for r in range(len(analysis.cell_ids))]


def column_bool(analysis, name) -> list:
    """Column ``name`` as True / False / None (None where empty or absent)."""
    return [_vbool(analysis, name, r) for r in range(len(analysis.cell_ids))]


# ----------------------------------------------------------------------------------------------
# which cells get a panel
# ----------------------------------------------------------------------------------------------
def select_cells(analysis, max_cells=40):
    """Rows of the cells that get a panel, and how many cells would qualify.

    A cell qualifies when its sparse-noise map is significant (``responsive``) or it responds to
    gratings (``grating_responsive``). Qualifying cells are ranked: responsive to both first, then to
    sparse noise only, then to gratings only; within a group by the map's signal-to-noise ratio
    (``snr``, highest first), gratings-only cells by their smallest grating p-value. The first
    ``max_cells`` are returned in cell-id (row) order.

    Parameters
    ----------
    analysis : map2d.analysis.Analysis
    max_cells : int or None
        Largest number of panels (None: no limit).

    Returns
    -------
    rows : list of int
        Row indices into ``analysis.cells`` / ``analysis.cell_ids``, ascending.
    n_qualifying : int
    """
    resp = [v is True for v in column_bool(analysis, "responsive")]
    gresp = [v is True for v in column_bool(analysis, "grating_responsive")]
    snr = column_float(analysis, "snr")
    p_g = np.fmin(column_float(analysis, "flashed_p_value"), column_float(analysis, "drifting_p_value"))
    keys = []
    for r in range(len(analysis.cell_ids)):
        if not (resp[r] or gresp[r]):
            continue
        group = 0 if (resp[r] and gresp[r]) else (1 if resp[r] else 2)
        strength = -snr[r] if group < 2 else p_g[r]
        keys.append((group, strength if np.isfinite(strength) else np.inf, r))
    keys.sort()
    chosen = [k[2] for k in keys]
    if max_cells is not None:
        chosen = chosen[:max(0, int(max_cells))]
    return sorted(chosen), len(keys)


# ----------------------------------------------------------------------------------------------
# small drawing helpers
# ----------------------------------------------------------------------------------------------
def outline_patch(analysis, row, **style):
    """The fitted receptive-field outline of one cell as a matplotlib patch (None without a fit).

    See the module notes for the contour drawn per model.
    """
    model = _vtext(analysis, "model", row)
    cx = _vfloat(analysis, "center_x_deg", row)
    cy = _vfloat(analysis, "center_y_deg", row)
    if not (np.isfinite(cx) and np.isfinite(cy)):
        return None
    return _outline(model, cx, cy, _shape_params(analysis, model, row), **style)


def _shape_params(analysis, model, row):
    if model == "gaussian":
        names = ("sigma_major_deg", "sigma_minor_deg", "theta_deg")
    elif model == "gabor":
        names = ("gabor_sigma_u_deg", "gabor_sigma_v_deg", "gabor_orientation_deg")
    elif model == "dog":
        names = ("rc_deg",)
    else:
        return ()
    return tuple(_vfloat(analysis, n, row) for n in names)


def _outline(model, cx, cy, params, **style):
    from matplotlib.patches import Ellipse

    if not params or not all(np.isfinite(params)):
        return None
    if model == "dog":
        r = params[0] / _SQRT2
        return Ellipse((cx, cy), 2 * r, 2 * r, angle=0.0, **style)
    a, b, theta = params
    return Ellipse((cx, cy), 2 * a, 2 * b, angle=theta, **style)


# ----------------------------------------------------------------------------------------------
# per cell
# ----------------------------------------------------------------------------------------------
def _map_lag_index(maps, c):
    """Peak lag, or for a cell that is not responsive the lag of its largest |linear z| (and False)."""
    li = int(maps.peak_lag_index[c])
    if li >= 0:
        return li, True
    z = np.abs(np.nan_to_num(maps.linear_z[c].reshape(maps.linear_z.shape[1], -1).astype(float)))
    return int(np.argmax(z.max(axis=1))), False


def _tuning_curves(an, c):
    """``(source, orientations, orientation curve, SFs, SF curve, surface, orientation fit)`` of one cell,
    or None (surface and orientation fit are None unless the table fitted the SF on the surface).

    The curves ``cells.csv`` is fitted to (:func:`map2d.fit.tuning.grating_tuning_columns`): from the
    flashed sequence, or from drifting gratings when the table says so (or without a flashed sequence).
    For a flashed sequence with a fitted orientation preference, the SF curve is taken near that
    preference, as the table's SF fit does.
    """
    from types import SimpleNamespace

    from ..fit import tuning as tu

    src = _vtext(an, "tuning_source", c)
    cid = int(an.cell_ids[c])
    order = [src] if src else []
    order += [s for s in ("flashed", "drifting") if s not in order]
    for s in order:
        res = an.flashed if s == "flashed" else an.drifting
        if res is None:
            continue
        idx = np.flatnonzero(np.asarray(res.cell_ids) == cid)
        if idx.size == 0:
            continue
        curves = tu._flashed_curves(res, int(idx[0])) if s == "flashed" else tu._drifting_curves(res, int(idx[0]))
        if curves is None:
            continue
        th, oc, sfs, sc = (np.asarray(a, float) for a in curves[:4])
        surface = curves[4] if len(curves) > 4 else None
        p = _ori_fit_params(an, c)
        ofit = None
        if s == src and surface is not None and p is not None:
            surface = np.asarray(surface, float)
            ofit = tu.OrientationFit(pref_deg=float(p[3]), pref_ci95_deg=np.nan,
                                     hwhh_deg=_vfloat(an, "orientation_hwhh_deg", c), hwhh_ci95_deg=np.nan,
                                     params=p, r2=np.nan, ok=True, p_tuned=0.0)
            sc = np.asarray(tu._sf_near(th, surface, SimpleNamespace(pref_deg=p[3], params=p)), float)
        return s, th, oc, sfs, sc, (surface if ofit is not None else None), ofit
    return None


def _ori_fit_params(an, c):
    """The von Mises parameters ``(b, a, kappa, theta0)`` of the table's orientation fit, or None."""
    p = np.array([_vfloat(an, k, c) for k in ("ori_fit_baseline", "ori_fit_amplitude", "ori_fit_kappa",
                                               "pref_orientation_deg")])
    return p if np.all(np.isfinite(p)) else None


def _sf_fit_curve(f, y, fine, th=None, surface=None, ofit=None):
    """The fitted SF curve on ``fine`` and its preferred SF, or None: the fit ``cells.csv`` uses
    (:func:`map2d.fit.tuning.table_sf_fit`; for an orientation-tuned cell, the profile along the
    preferred orientation of the fit to the whole orientation x SF surface, which lies a little above
    the rows nearest the preference, since those rows miss the peak).

    When the fit is a model average its ``params`` are the heavier model's (``params_model``); that
    model's function is drawn.
    """
    from ..fit import tuning as tu

    sfit = tu.table_sf_fit(th, f, y, surface, ofit)
    if not sfit.ok:
        return None
    fn = {"log_gaussian": tu.log_gaussian_sf, "gaussian": tu.gaussian_sf, "dog": tu.dog_sf}[sfit.params_model]
    with np.errstate(all="ignore"):
        return fn(fine, *sfit.params), sfit.pref_cpd


def _measured_h(an):
    """The measured flashed-grating surface that the agreement uses (``analysis.measured_h``), else the
    flashed result's own (lags pooled when available, else at the peak lag)."""
    if an.measured_h is not None:
        return an.measured_h
    h = getattr(an.flashed, "harmonic_combined", None)
    return an.flashed.harmonic_at_peak if h is None else h
