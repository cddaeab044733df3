"""Figures of the report: a summary of the session and one panel per cell.

Every function returns :class:`matplotlib.figure.Figure` objects built directly (no ``pyplot``), so
nothing global changes in the caller's matplotlib state and the figures are freed as soon as they
are dropped. :func:`figure_png_base64` renders one with the Agg canvas.

Conventions of the drawings
---------------------------
- Maps are drawn with ``imshow(origin='upper')`` over :meth:`map2d.geometry.Grid.extent_deg`: row 0 is
  the top of the stimulus grid (contract), x is azimuth and y is elevation in degrees.
- Signed maps use a diverging colour map centred on 0 with symmetric limits; magnitudes a sequential one.
- Receptive-field outlines are the contour at ``exp(-1/2)`` of the fitted envelope's peak (1 s.d.):
  the Gaussian's ellipse (``sigma_major``, ``sigma_minor``, ``theta``), the Gabor's envelope
  (``sigma_u`` along the wave vector, ``sigma_v`` across) and, for the difference of Gaussians, the
  centre Gaussian ``exp(-r^2 / rc^2)``, i.e. a circle of radius ``rc / sqrt(2)``.
- Orientation x SF surfaces show ``|H|``, the magnitude of the first harmonic over phase per unit
  contrast; the predicted surface is multiplied by the least-squares gain of the forward agreement
  (:func:`map2d.reconcile.forward_agreement`) so that both are in the measured units.
- Tuning curves are re-fitted here with :func:`map2d.fit.tuning.fit_orientation` and
  :func:`map2d.fit.tuning.fit_sf` on the same curves that ``cells.csv`` uses.
"""

from __future__ import annotations

import base64
import io
import math

import numpy as np
from matplotlib.collections import PatchCollection
from matplotlib.figure import Figure
from matplotlib.patches import Ellipse, Rectangle
from matplotlib.ticker import FixedLocator, FuncFormatter, LogLocator, MaxNLocator, NullLocator

__all__ = [
    "DPI", "column_float", "column_text", "column_bool", "select_cells", "summary_figures",
    "field_figure", "tuning_summary_figure", "CellPanels", "cell_figure", "figure_png_base64",
    "outline_patch",
]

DPI = 80
#: Our colours: one per fitted model, one per linearity call.
MODEL_COLOURS = {"gaussian": "#23798a", "dog": "#d7812a", "gabor": "#7a4e9f"}
LINEAR_COLOURS = {True: "#23798a", False: "#b8383d", None: "#8c8c8c"}
SIGNED_CMAP = "PuOr_r"       # orange = positive (more response), purple = negative
MAGNITUDE_CMAP = "viridis"
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
    if not params or not all(np.isfinite(params)):
        return None
    if model == "dog":
        r = params[0] / _SQRT2
        return Ellipse((cx, cy), 2 * r, 2 * r, angle=0.0, **style)
    a, b, theta = params
    return Ellipse((cx, cy), 2 * a, 2 * b, angle=theta, **style)


def _no_data(ax, text):
    ax.text(0.5, 0.5, text, ha="center", va="center", transform=ax.transAxes, fontsize=8,
            color="#555555")


def _edges(centres, log=False):
    """Cell edges around sorted centres (geometric midpoints on a log axis)."""
    c = np.asarray(centres, float)
    v = np.log(c) if log else c
    if v.size == 1:
        step = math.log(2.0) if log else 10.0
        e = np.array([v[0] - step / 2, v[0] + step / 2])
    else:
        mid = 0.5 * (v[1:] + v[:-1])
        e = np.concatenate([[v[0] - (mid[0] - v[0])], mid, [v[-1] + (v[-1] - mid[-1])]])
    return np.exp(e) if log else e


def _colourbar(fig, ax, mappable, label):
    cax = ax.inset_axes([1.04, 0.0, 0.05, 1.0])
    cb = fig.colorbar(mappable, cax=cax)
    cb.set_label(label, fontsize=7)
    cb.ax.tick_params(labelsize=6)
    cb.locator = MaxNLocator(nbins=4)
    cb.update_ticks()
    return cb


def _style(ax, title=None, nx=4, ny=4):
    """Small fonts, few ticks, and a title at a fixed height (matplotlib skips its costly search)."""
    ax.tick_params(labelsize=7)
    ax.xaxis.label.set_size(8)
    ax.yaxis.label.set_size(8)
    for axis, n in ((ax.xaxis, nx), (ax.yaxis, ny)):
        if axis.get_scale() == "linear" and n:
            axis.set_major_locator(MaxNLocator(nbins=n))
        elif axis.get_scale() == "log":
            axis.set_major_locator(LogLocator(base=10.0, subs=(1.0, 2.0, 5.0)))
            axis.set_minor_locator(NullLocator())
            axis.set_major_formatter(FuncFormatter(lambda v, pos: f"{v:g}"))
    if title:
        ax.set_title(title, fontsize=8.5, y=1.0, pad=4)


def figure_png_base64(fig) -> str:
    """Render ``fig`` as PNG (Agg) and return it base64-encoded (ASCII)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=fig.dpi)
    return base64.b64encode(buf.getvalue()).decode("ascii")


# ----------------------------------------------------------------------------------------------
# summary
# ----------------------------------------------------------------------------------------------
def field_figure(analysis):
    """Receptive-field centres and fitted outlines over the stimulus grid (None without maps)."""
    grid = analysis.grid
    if grid is None:
        return None
    fig = Figure(figsize=(7.0, 5.2), dpi=DPI)
    ax = fig.add_subplot(1, 1, 1)
    left, right, bottom, top = grid.extent_deg
    ax.add_patch(Rectangle((left, bottom), right - left, top - bottom, fill=False, lw=1.0, ls="--",
                           ec="#444444"))
    models = column_text(analysis, "model")
    cx = column_float(analysis, "center_x_deg")
    cy = column_float(analysis, "center_y_deg")
    resp = column_bool(analysis, "responsive")
    patches, colours, used = [], [], set()
    show = np.isfinite(cx) & np.isfinite(cy)
    for r in np.flatnonzero(show):
        p = _outline(models[r], cx[r], cy[r], _shape_params(analysis, models[r], r))
        col = MODEL_COLOURS.get(models[r], "#8c8c8c")
        used.add(models[r])
        if p is not None:
            patches.append(p)
            colours.append(col)
    if patches:
        ax.add_collection(PatchCollection(patches, facecolors="none", edgecolors=colours, linewidths=1.0,
                                          alpha=0.85))
    if show.any():
        ax.scatter(cx[show], cy[show], s=10, c=[MODEL_COLOURS.get(models[r], "#8c8c8c")
                                               for r in np.flatnonzero(show)], zorder=3)
        if show.sum() <= 60:
            for r in np.flatnonzero(show):
                ax.annotate(str(analysis.cell_ids[r]), (cx[r], cy[r]), xytext=(3, 3),
                            textcoords="offset points", fontsize=6, color="#333333")
    else:
        n_resp = sum(1 for v in resp if v)
        _no_data(ax, f"no fitted receptive field ({n_resp} responsive cells)")
    for m in ("gaussian", "dog", "gabor"):
        if m in used:
            ax.plot([], [], color=MODEL_COLOURS[m], marker="o", ms=4, lw=1,
                    label={"gaussian": "Gaussian fit", "dog": "difference of Gaussians",
                           "gabor": "Gabor fit"}[m])
    if used & set(MODEL_COLOURS):
        ax.legend(fontsize=7, loc="upper right", framealpha=0.8)
    pad = 0.05 * max(right - left, top - bottom)
    ax.set_xlim(left - pad, right + pad)
    ax.set_ylim(bottom - pad, top + pad)
    ax.set_aspect("equal")
    ax.set_xlabel("azimuth (deg)")
    ax.set_ylabel("elevation (deg)")
    _style(ax, "receptive-field centres and 1-s.d. outlines; dashed: stimulus grid", nx=8, ny=8)
    fig.subplots_adjust(left=0.1, right=0.97, bottom=0.1, top=0.93)
    return fig


def tuning_summary_figure(analysis):
    """Preferred orientation vs preferred SF, and the agreement and F1/F0 distributions."""
    fig = Figure(figsize=(11.0, 3.4), dpi=DPI)
    ax1, ax2, ax3 = (fig.add_subplot(1, 3, k) for k in (1, 2, 3))
    ori = column_float(analysis, "pref_orientation_deg")
    sf = column_float(analysis, "pref_sf_cpd")
    lin = column_bool(analysis, "linear")
    ok = np.isfinite(ori) & np.isfinite(sf) & (sf > 0)
    if ok.any():
        for call, name in ((True, "linear"), (False, "not linear"), (None, "no linearity call")):
            sel = ok & np.array([v is call for v in lin])
            if sel.any():
                ax1.scatter(ori[sel], sf[sel], s=14, color=LINEAR_COLOURS[call], label=name, alpha=0.85)
        ax1.legend(fontsize=7, loc="best")
        ax1.set_yscale("log")
    else:
        _no_data(ax1, "no preferred orientation and SF\n(no cell tuned to gratings)")
    ax1.set_xlim(0, 180)
    ax1.set_xlabel("preferred orientation (deg)")
    ax1.set_ylabel("preferred spatial frequency (cycles/deg)")
    _style(ax1, "orientation and spatial frequency")
    ax1.set_xticks([0, 45, 90, 135, 180])
    tested = [np.asarray(r.sfs_cpd, float) for r in (analysis.flashed, analysis.drifting) if r is not None]
    tested = np.concatenate(tested) if tested else np.zeros(0)
    tested = tested[np.isfinite(tested) & (tested > 0)]
    if ok.any() and tested.size:
        lo, hi = min(tested.min(), sf[ok].min()), max(tested.max(), sf[ok].max())
        ax1.set_ylim(lo / 1.4, hi * 1.4)
        _log_ticks(ax1.yaxis, tested)

    agr = column_float(analysis, "agreement")
    agr = agr[np.isfinite(agr)]
    if agr.size:
        ax2.hist(agr, bins=np.linspace(0, 1, 21), color="#23798a", edgecolor="white")
    else:
        why = "needs sparse noise and flashed gratings" if (analysis.maps is None or analysis.flashed is None) \
            else "no responsive cell with enough conditions"
        _no_data(ax2, f"no agreement values\n({why})")
    ax2.set_xlim(0, 1)
    ax2.set_xlabel("map-grating agreement (fraction of variance)")
    ax2.set_ylabel("cells (count)")
    _style(ax2, f"agreement, {agr.size} cells")
    ax2.yaxis.set_major_locator(MaxNLocator(nbins=4, integer=True))

    f = column_float(analysis, "f1_f0")
    f = f[np.isfinite(f)]
    top = max(2.0, float(np.ceil(np.max(f) * 4) / 4) if f.size else 2.0)
    if f.size:
        ax3.hist(np.clip(f, 0, top), bins=np.linspace(0, top, int(round(top / 0.1)) + 1), color="#d7812a",
                 edgecolor="white")
    else:
        _no_data(ax3, "no F1/F0 values\n(needs drifting gratings)")
    ax3.axvline(1.0, color="#333333", lw=1, ls="--")
    ax3.text(0.97, 0.97, "complex", transform=ax3.get_xaxis_transform(), fontsize=7, va="top", ha="right",
             color="#333333")
    ax3.text(1.03, 0.97, "simple", transform=ax3.get_xaxis_transform(), fontsize=7, va="top", ha="left",
             color="#333333")
    ax3.set_xlim(0, top)
    ax3.xaxis.set_major_locator(MaxNLocator(nbins=5, steps=[1, 2, 2.5, 5, 10]))
    ax3.set_xlabel("F1/F0 (ratio, dimensionless)")
    ax3.set_ylabel("cells (count)")
    _style(ax3, f"modulation ratio, {f.size} cells", nx=0)
    ax3.yaxis.set_major_locator(MaxNLocator(nbins=4, integer=True))
    fig.subplots_adjust(left=0.07, right=0.98, bottom=0.16, top=0.9, wspace=0.32)
    return fig


def summary_figures(analysis):
    """``[(figure id, caption, Figure)]`` of the summary page (figures that cannot be drawn are left out)."""
    out = []
    f = field_figure(analysis)
    if f is not None:
        out.append(("fig-field", "Receptive fields over the visual field: fitted centre (dot) and outline "
                    "(1-s.d. contour of the fitted envelope; difference of Gaussians: centre Gaussian) of every "
                    "fitted cell. Dashed rectangle: the sparse-noise grid.", f))
    out.append(("fig-tuning-summary", "Left: preferred orientation (wave-vector angle, mod 180) against "
                "preferred spatial frequency, coloured by the linearity call. Middle: agreement between the "
                "sparse-noise map and the flashed-grating responses (fraction of the measured first-harmonic "
                "surface explained by the map's prediction). Right: F1/F0 from drifting gratings; the dashed "
                "line at 1 separates complex (below) from simple cells (above; Skottun et al. 1991).",
                tuning_summary_figure(analysis)))
    return out


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


def _log_ticks(axis, values):
    """Major ticks of a log axis at (at most 4 of) the tested values."""
    v = np.asarray(values, float)
    v = np.unique(v[np.isfinite(v) & (v > 0)])
    if v.size > 4:
        v = v[np.unique(np.round(np.linspace(0, v.size - 1, 4)).astype(int))]
    axis.set_major_locator(FixedLocator(v))


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


def _finite_max_abs(*arrays):
    vals = [float(np.max(np.abs(a[np.isfinite(a)]))) for a in arrays if np.isfinite(a).any()]
    m = max(vals) if vals else 0.0
    return m if m > 0 else 1.0


class CellPanels:
    """One reusable Figure that draws the panel of any cell of an analysis.

    The layout depends only on what the session holds, so the axes, colour bars and artists are built
    once and every :meth:`draw` only replaces data, limits and titles (building a dozen matplotlib axes
    costs more than drawing them; this keeps a report of many cells fast). Rows, each present only
    when its data exist:

    1. ``maps``: ON, OFF and linear maps at the peak lag with the fitted outline; the time course of
       the three maps at the peak pixel.
    2. ``surfaces``: measured and predicted ``|H|`` over orientation x SF; the map reconstructed from
       the gratings beside the measured map limited to the same band.
    3. ``tuning``: orientation and SF tuning with fits; size tuning predicted from the map; the
       flashed-grating response over lag.

    Parameters
    ----------
    analysis : map2d.analysis.Analysis

    Examples
    --------
    ``fig = CellPanels(analysis).draw(row)`` returns the Figure for the cell in row ``row``; the
    next :meth:`draw` redraws the same Figure, so encode it (:func:`figure_png_base64`) first.
    """

    def __init__(self, analysis):
        an = self.an = analysis
        self.unit = an.unit
        self.has_maps = an.maps is not None
        self.has_fl = an.flashed is not None
        self.has_pred = self.has_maps and self.has_fl and an.predicted_h is not None
        self.has_inv = self.has_pred and an.inverse is not None
        self.has_tuning = self.has_fl or an.drifting is not None
        self.has_size = self.has_maps and an.size_disk is not None and an.size_radii_deg is not None
        self.rows = ([("maps", 4)] if self.has_maps else []) + ([("surfaces", 2 + 2 * self.has_inv
                                                                  if self.has_pred else 1)] if self.has_fl else [])
        n_tun = 2 * self.has_tuning + self.has_size + self.has_fl
        if n_tun:
            self.rows.append(("tuning", n_tun))
        n = max(1, len(self.rows))
        self.fig = Figure(figsize=(12.5, 2.75 * n), dpi=DPI)
        outer = self.fig.add_gridspec(n, 1, hspace=0.62, left=0.055, right=0.935,
                                      bottom=0.5 / (2.75 * n), top=1 - 0.3 / (2.75 * n))
        # rows with a colour bar in a gap get wider gaps (bar, its label and the next axis's label)
        self.gs = [outer[k, 0].subgridspec(1, 4, wspace=0.95 if kind in ("maps", "surfaces") else 0.6)
                   for k, (kind, _) in enumerate(self.rows)]
        for k, (kind, _) in enumerate(self.rows):
            getattr(self, f"_build_{kind}")(k)

    # -- helpers -----------------------------------------------------------------------------------
    def _ax(self, k, j):
        return self.fig.add_subplot(self.gs[k][0, j])

    def _note(self, ax):
        return ax.text(0.5, 0.5, "", ha="center", va="center", transform=ax.transAxes, fontsize=8,
                       color="#555555", visible=False, zorder=5)

    @staticmethod
    def _say(note, text):
        note.set_text(text or "")
        note.set_visible(bool(text))

    def _image_axes(self, k, j, cmap, title_hint):
        grid = self.an.maps.grid
        ext = grid.extent_deg
        ax = self._ax(k, j)
        im = ax.imshow(np.zeros(grid.shape), cmap=cmap, vmin=-1, vmax=1, extent=ext, origin="upper",
                       interpolation="nearest")
        ax.set_xlim(ext[0], ext[1])
        ax.set_ylim(ext[2], ext[3])
        ax.set_xlabel("azimuth (deg)")
        ax.set_ylabel("elevation (deg)")
        _style(ax, title_hint, nx=3, ny=3)
        return ax, im, self._note(ax)

    # -- row 1: maps ----------------------------------------------------------------------------------
    def _build_maps(self, k):
        self.map_axes = []
        for j, t in enumerate(("ON", "OFF", "linear")):
            ax, im, note = self._image_axes(k, j, SIGNED_CMAP, t)
            outline = Ellipse((0, 0), 1, 1, fill=False, ec="#111111", lw=1.2, visible=False, zorder=4)
            ax.add_patch(outline)
            (centre,) = ax.plot([np.nan], [np.nan], marker="+", color="#111111", ms=6, zorder=4)
            self.map_axes.append((ax, im, note, outline, centre))
        _colourbar(self.fig, self.map_axes[2][0], self.map_axes[2][1], f"change ({self.unit})")
        ax = self._ax(k, 3)
        self.tc_lines = [ax.plot([], [], marker="o", ms=3, lw=1.2, color=col, ls=ls, label=name)[0]
                         for name, col, ls in (("ON", "#d7812a", "-"), ("OFF", "#7a4e9f", "-"),
                                               ("linear", "#222222", "--"))]
        ax.axhline(0.0, color="#999999", lw=0.6)
        self.tc_mark = ax.axvline(0.0, color="#999999", lw=0.8, ls=":")
        ax.legend(fontsize=6, loc="best")
        ax.set_xlabel("lag (ms)")
        ax.set_ylabel(f"response change ({self.unit})")
        _style(ax, "time course")
        lags = 1000.0 * np.asarray(self.an.maps.lags_s, float)
        pad = 0.05 * max(float(np.ptp(lags)), 1.0)
        ax.set_xlim(lags[0] - pad, lags[-1] + pad)
        self.tc_ax = ax

    def _draw_maps(self, c):
        an, m = self.an, self.an.maps
        li, significant = _map_lag_index(m, c)
        planes = [np.asarray(m.on[c, li], float), np.asarray(m.off[c, li], float),
                  np.asarray(m.linear[c, li], float)]
        vmax = _finite_max_abs(*planes)
        lag_ms = 1000.0 * float(m.lags_s[li])
        model = _vtext(an, "model", c)
        cx, cy = _vfloat(an, "center_x_deg", c), _vfloat(an, "center_y_deg", c)
        params = _shape_params(an, model, c)
        shape = None
        if np.isfinite(cx) and np.isfinite(cy) and params and all(np.isfinite(params)):
            if model == "dog":
                shape = (2 * params[0] / _SQRT2, 2 * params[0] / _SQRT2, 0.0)
            else:
                shape = (2 * params[0], 2 * params[1], params[2])
        names = ("bright spots (ON)", "dark spots (OFF)", "linear (ON - OFF)")
        for (ax, im, note, outline, centre), p, name in zip(self.map_axes, planes, names):
            im.set_data(p)
            im.set_clim(-vmax, vmax)
            self._say(note, "" if np.isfinite(p).any() else "not estimated\n(dense noise)")
            if shape is not None:
                outline.set_center((cx, cy))
                outline.set_width(shape[0])
                outline.set_height(shape[1])
                outline.set_angle(shape[2])
                outline.set_visible(True)
                centre.set_data([cx], [cy])
            else:
                outline.set_visible(False)
                centre.set_data([np.nan], [np.nan])
            ax.set_title(f"{name}, {lag_ms:.0f} ms" + ("" if significant else " (n.s.)"), fontsize=8.5,
                         y=1.0, pad=4)
        # time course at the peak pixel of the linear map
        z = np.abs(np.nan_to_num(np.asarray(m.linear_z[c, li], float)))
        i, j = np.unravel_index(int(np.argmax(z)), z.shape)
        lags = 1000.0 * np.asarray(m.lags_s, float)
        for line, arr in zip(self.tc_lines, (m.on, m.off, m.linear)):
            line.set_data(lags, np.asarray(arr[c, :, i, j], float))
        self.tc_mark.set_xdata([lags[li], lags[li]])
        x, y = m.grid.point_of(i, j)
        self.tc_ax.set_title(f"time course at ({float(x):.0f}, {float(y):.0f}) deg", fontsize=8.5, y=1.0, pad=4)
        self.tc_ax.relim()
        self.tc_ax.autoscale_view(scalex=False)

    # -- row 2: surfaces ------------------------------------------------------------------------------
    def _build_surfaces(self, k):
        fl = self.an.flashed
        ori = np.asarray(fl.orientations_deg, float)
        sfs = np.asarray(fl.sfs_cpd, float)
        oe, se = _edges(ori), _edges(sfs, log=True)
        zero = np.zeros((sfs.size, ori.size))
        self.surf = []
        for j, title in enumerate(("measured |H|", "predicted from map x gain")[:1 + self.has_pred]):
            ax = self._ax(k, j)
            mesh = ax.pcolormesh(oe, se, zero, cmap=MAGNITUDE_CMAP, vmin=0, vmax=1, shading="flat")
            ax.set_yscale("log")
            ax.set_xlim(oe[0], oe[-1])
            ax.set_ylim(se[0], se[-1])
            ax.set_xlabel("orientation (deg)")
            ax.set_ylabel("spatial frequency (cycles/deg)")
            _style(ax, title)
            _log_ticks(ax.yaxis, sfs)
            self.surf.append((ax, mesh, self._note(ax)))
        _colourbar(self.fig, self.surf[-1][0], self.surf[-1][1], f"|H| ({self.unit} / contrast)")
        if self.has_inv:
            self.inv = []
            for j, title in ((2, "map from gratings"), (3, "measured map, same band")):
                ax, im, note = self._image_axes(k, j, SIGNED_CMAP, title)
                self.inv.append((ax, im, note))
            _colourbar(self.fig, self.inv[1][0], self.inv[1][1], "weight (fraction of max)")

    def _draw_surfaces(self, c):
        an = self.an
        meas = np.abs(np.asarray(_measured_h(an)[c]))
        vmax = _finite_max_abs(meas)
        ax, mesh, note = self.surf[0]
        mesh.set_array(meas.T.ravel())
        mesh.set_clim(0, vmax)
        self._say(note, "" if np.isfinite(meas).any() else "no flashed-grating data")
        if self.has_pred:
            ax, mesh, note = self.surf[1]
            ok_map = bool(an.maps.responsive[c])
            pred = np.abs(np.asarray(an.predicted_h[c])) if ok_map else np.full(meas.shape, np.nan)
            gain = float(an.forward["gain"][c]) if an.forward is not None else float("nan")
            if ok_map and np.isfinite(gain) and gain > 0:
                pred = pred * gain
                title = f"predicted from map x gain {gain:.3g}"
            elif ok_map:
                pred = pred / _finite_max_abs(pred) * vmax
                title = "predicted from map (shape only: no positive gain)"
            else:
                title = "predicted from map"
            vmax = _finite_max_abs(meas, pred)
            mesh.set_array(pred.T.ravel())
            for _, msh, _n in self.surf:
                msh.set_clim(0, vmax)
            ax.set_title(title, fontsize=8.5, y=1.0, pad=4)
            self._say(note, "" if ok_map else "no significant map\nto predict from")
        if self.has_inv:
            inv = an.inverse
            sim = float(inv.similarity[c])
            ok_map = bool(an.maps.responsive[c])
            for k, ((ax, im, note), arr) in enumerate(zip(self.inv, (inv.from_gratings[c], inv.from_map[c]))):
                a = np.asarray(arr, float)
                peak = float(np.nanmax(np.abs(a))) if np.isfinite(a).any() else 0.0
                good = peak > 0 and (ok_map or k == 0)      # the map from gratings needs no map
                im.set_data(a / peak if good else np.full(a.shape, np.nan))
                im.set_clim(-1, 1)
                self._say(note, "" if good else ("no significant map" if k else "no grating response"))
            self.inv[1][0].set_title("measured map, same band" + (f" (r = {sim:.2f})" if np.isfinite(sim) else ""),
                                     fontsize=8.5, y=1.0, pad=4)

    # -- row 3: tuning --------------------------------------------------------------------------------
    def _build_tuning(self, k):
        j = 0
        if self.has_tuning:
            ax_o, ax_s = self._ax(k, 0), self._ax(k, 1)
            (self.o_pts,) = ax_o.plot([], [], "o", ms=4, color="#23798a", label="measured")
            (self.o_fit,) = ax_o.plot([], [], color="#222222", lw=1.2, label="von Mises fit")
            (self.s_pts,) = ax_s.plot([], [], "o", ms=4, color="#d7812a", label="measured")
            (self.s_fit,) = ax_s.plot([], [], color="#222222", lw=1.2, label="fit")
            ax_o.set_xlim(0, 180)
            ax_o.set_xlabel("orientation (deg)")
            ax_o.set_ylabel(f"response ({self.unit})")
            _style(ax_o, "orientation tuning")
            ax_o.set_xticks([0, 45, 90, 135, 180])
            ax_s.set_xscale("log")
            ax_s.set_xlabel("spatial frequency (cycles/deg)")
            ax_s.set_ylabel(f"response ({self.unit})")
            _style(ax_s, "spatial-frequency tuning")
            self.o_ax, self.s_ax = ax_o, ax_s
            self.o_note, self.s_note = self._note(ax_o), self._note(ax_s)
            j = 2
        if self.has_size:
            ax = self._ax(k, j)
            r = np.asarray(self.an.size_radii_deg, float)
            (self.sz_disk,) = ax.plot(r, np.zeros_like(r), "-o", ms=3, color="#23798a", label="disk (radius)")
            (self.sz_ann,) = ax.plot(r, np.zeros_like(r), "-s", ms=3, color="#b8383d",
                                     label=f"annulus (hole radius, outer {r.max():.0f} deg)")
            ax.axhline(0.0, color="#999999", lw=0.6)
            ax.legend(fontsize=6, loc="best")
            ax.set_xlabel("radius (deg)")
            ax.set_ylabel(f"response ({self.unit} x deg^2)")
            _style(ax, "size tuning predicted from map")
            self.sz_ax, self.sz_note = ax, self._note(ax)
            j += 1
        if self.has_fl:
            ax = self._ax(k, j)
            lags = 1000.0 * np.asarray(self.an.flashed.lags_s, float)
            (self.g_line,) = ax.plot(lags, np.zeros_like(lags), "-o", ms=3, color="#7a4e9f")
            self.g_mark = ax.axvline(lags[0], color="#999999", lw=0.8, ls=":")
            ax.set_xlabel("lag (ms)")
            ax.set_ylabel(f"s.d. across gratings ({self.unit})")
            _style(ax, "flashed-grating response vs lag")
            pad = 0.05 * max(float(np.ptp(lags)), 1.0)
            ax.set_xlim(lags[0] - pad, lags[-1] + pad)
            self.g_ax = ax

    def _draw_tuning(self, c):
        an = self.an
        from ..fit import tuning as tu

        if self.has_tuning:
            got = _tuning_curves(an, c)
            fitted = _vbool(an, "grating_responsive", c) is True
            o_title, s_title = "orientation", "spatial frequency"
            nothing = [], []
            if got is None:
                for ln in (self.o_pts, self.o_fit, self.s_pts, self.s_fit):
                    ln.set_data(*nothing)
            else:
                src, th, oc, sfs, sc, surface, ofit = got
                self.o_pts.set_data(th, oc)
                p = _ori_fit_params(an, c) if fitted else None
                if p is not None:           # the table's fit (not re-fitted: fits can be slow)
                    fine = np.linspace(0, 180, 91)
                    self.o_fit.set_data(fine, tu.von_mises_orientation(fine, *p))
                    o_title += f", pref {p[3]:.0f} deg"
                else:
                    self.o_fit.set_data(*nothing)
                self.s_pts.set_data(sfs, sc)
                pos = sfs[np.isfinite(sfs) & (sfs > 0)]
                curve = None
                if fitted and pos.size:
                    fine = np.geomspace(pos.min() / 1.5, pos.max() * 1.5, 60)
                    curve = _sf_fit_curve(sfs, sc, fine, th, surface, ofit)
                if curve is not None:
                    self.s_fit.set_data(fine, curve[0])
                    if np.isfinite(curve[1]):
                        s_title += f", pref {curve[1]:.2g} cyc/deg"
                else:
                    self.s_fit.set_data(*nothing)
                if pos.size:
                    self.s_ax.set_xlim(pos.min() / 1.6, pos.max() * 1.6)
                    _log_ticks(self.s_ax.xaxis, pos)
                tag = f" ({src})" if fitted else f" ({src}, n.s.)"
                o_title += tag
                s_title += tag
            self._say(self.o_note, "" if got is not None else "no grating curve")
            self._say(self.s_note, "" if got is not None else "no grating curve")
            self.o_ax.set_title(o_title, fontsize=8.5, y=1.0, pad=4)
            self.s_ax.set_title(s_title, fontsize=8.5, y=1.0, pad=4)
            for ax in (self.o_ax, self.s_ax):
                ax.relim()
                ax.autoscale_view(scalex=False)
        if self.has_size:
            d = np.asarray(an.size_disk[c], float)
            a = np.asarray(an.size_annulus[c], float)
            self.sz_disk.set_ydata(d)
            self.sz_ann.set_ydata(a)
            self._say(self.sz_note, "" if np.isfinite(d).any() else "no fitted centre")
            self.sz_ax.relim()
            self.sz_ax.autoscale_view()
        if self.has_fl:
            fl = an.flashed
            e = np.asarray(fl.energy[c], float)
            self.g_line.set_ydata(np.sqrt(np.clip(e, 0, None)))
            pl = int(fl.peak_lag_index[c])
            lags = self.g_line.get_xdata()
            if 0 <= pl < len(lags):
                self.g_mark.set_xdata([lags[pl], lags[pl]])
                self.g_mark.set_visible(True)
            else:
                self.g_mark.set_visible(False)
            self.g_ax.relim()
            self.g_ax.autoscale_view(scalex=False)

    # -- public -----------------------------------------------------------------------------------------
    def draw(self, row):
        """Draw the cell in row ``row`` (index into ``analysis.cell_ids``) and return the Figure."""
        c = int(row)
        for kind, _ in self.rows:
            getattr(self, f"_draw_{kind}")(c)
        return self.fig


def cell_figure(analysis, row):
    """The panel of one cell as a new Figure (see :class:`CellPanels`, which reuses one Figure)."""
    return CellPanels(analysis).draw(row)
