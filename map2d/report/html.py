"""``report.html``: one self-contained page for a session of any size (no network, no server, no files
beside it).

Layout: what the session holds and what was absent, counts that account for every cell, notes, the
population at a glance (receptive-field mosaic coloured by the linearity call, preferred orientation
and SF, histograms with their thresholds), for imaging the field-of-view maps with ROI numbers and the
retinotopy check, then the cell index (sortable, filterable; row ``id="cell-<id>"`` for every cell) with
the cell viewer (key values beside the figures; previous / next), and the whole ``cells.csv`` table.

Every figure is drawn in the browser by :file:`page.js` (SVG and canvas, plain JavaScript embedded in
the page) from the small arrays of :mod:`map2d.report.data`; a cell's arrays are decoded and drawn only
when it is opened. Writing the page costs a few milliseconds per cell (see ``benchmarks/README.md``).
"""

from __future__ import annotations

import html
import json
import math
from pathlib import Path

import numpy as np

from . import data as D
from . import figures as F

__all__ = ["write_report", "render_report", "REPORT_FILE"]

REPORT_FILE = "report.html"
_JS_FILE = Path(__file__).with_name("page.js")

_CSS = """
body { font-family: system-ui, -apple-system, 'Segoe UI', sans-serif; margin: 0; color: #1f2328;
       background: #f6f5f1; font-size: 14px; }
header { background: #24414a; color: #f6f5f1; padding: 16px 28px; }
header h1 { margin: 0 0 4px 0; font-size: 22px; font-weight: 600; }
header p { margin: 0; font-size: 13px; opacity: 0.9; }
header nav a { color: #f6f5f1; margin-right: 16px; font-size: 13px; }
main { padding: 6px 28px 40px 28px; }
h2 { font-size: 18px; margin: 26px 0 8px 0; border-bottom: 2px solid #c9c3b4; padding-bottom: 4px; }
h3 { font-size: 15px; margin: 0; }
p, li { font-size: 14px; line-height: 1.45; max-width: 1100px; }
table { border-collapse: collapse; font-size: 13px; }
td, th { padding: 2px 8px; border-bottom: 1px solid #e0dccf; text-align: left; vertical-align: top; }
th { background: #ebe7dc; font-weight: 600; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
.facts { display: flex; flex-wrap: wrap; gap: 28px; align-items: flex-start; }
.absent { color: #7a3b2e; }
#population, #retinotopy { display: flex; flex-wrap: wrap; gap: 14px; align-items: flex-start; }
figure.pop { margin: 0; background: #fff; padding: 8px; border: 1px solid #ddd8ca; width: min-content; }
figure.pop figcaption { font-size: 13px; color: #333; margin-top: 4px; line-height: 1.35; }
figure.pop svg { display: block; }
svg.plot text { font-family: system-ui, -apple-system, 'Segoe UI', sans-serif; fill: #222; }
svg text.tick { font-size: 11.5px; } svg text.lab { font-size: 12.5px; } svg text.ttl { font-size: 13px; font-weight: 600; }
svg text.small { font-size: 11.5px; } svg text.note { font-size: 12.5px; font-weight: 600; }
.pick { cursor: pointer; } .pick:hover { stroke-width: 3; } .pick.picked { stroke: #000; stroke-width: 3.2; }
#fov-wrap { display: flex; gap: 12px; align-items: flex-start; flex-wrap: wrap; }
#fov-map canvas { display: block; cursor: pointer; border: 1px solid #999; }
#fov-props button, .vhead button { font: inherit; font-size: 13px; margin: 0 6px 6px 0; padding: 3px 10px;
       border: 1px solid #8a8576; background: #fbfaf7; border-radius: 3px; cursor: pointer; }
#fov-props button.on { background: #24414a; color: #fff; }
.keys span { display: inline-block; margin: 6px 12px 0 0; font-size: 13px; }
.keys i { display: inline-block; width: 14px; height: 14px; margin-right: 5px; vertical-align: -2px;
          border: 1px solid #555; }
.controls { margin: 6px 0; display: flex; gap: 12px; align-items: center; flex-wrap: wrap; }
.controls input { font: inherit; width: 360px; padding: 3px 6px; }
.controls select { font: inherit; }
#index-scroll { max-height: 330px; overflow: auto; border: 1px solid #ddd8ca; background: #fff;
                display: inline-block; max-width: 100%; }
#index th { position: sticky; top: 0; cursor: pointer; white-space: nowrap; user-select: none; }
#index th[data-sort=up]::after { content: " \\25B2"; } #index th[data-sort=down]::after { content: " \\25BC"; }
#index td { white-space: nowrap; }
#index tbody tr { cursor: pointer; } #index tbody tr:hover { background: #eef3f4; }
#index tbody tr.sel { background: #d7e6ea; }
#viewer { margin-top: 12px; background: #fbfaf7; border: 1px solid #ddd8ca; padding: 10px; min-height: 200px; }
.vhead { display: flex; align-items: center; gap: 10px; margin-bottom: 8px; }
.vhead .hint { color: #666; font-size: 12.5px; }
.vbody { display: flex; gap: 14px; align-items: flex-start; }
.facts-box { flex: 0 0 280px; } .facts-box table { width: 280px; }
.figs { flex: 1 1 auto; min-width: 0; }
.figrow { display: flex; flex-wrap: wrap; gap: 6px; margin-bottom: 10px; background: #fff;
          border: 1px solid #e4e0d4; padding: 4px; }
.rowtitle { flex: 0 0 100%; font-size: 13px; color: #555; }
.flagged { margin-top: 6px; flex: 0 0 100%; }
.scroll { overflow: auto; max-height: 560px; border: 1px solid #ddd8ca; background: #ffffff; }
.scroll table th { position: sticky; top: 0; white-space: nowrap; }
.scroll td { white-space: nowrap; max-width: 260px; overflow: hidden; text-overflow: ellipsis; }
"""


# ----------------------------------------------------------------------------------------------
# formatting
# ----------------------------------------------------------------------------------------------
def _esc(v) -> str:
    return html.escape(str(v), quote=True)


def _cell_text(v) -> str:
    """A cells.csv value as the CSV shows it: empty for missing, true/false, 4 significant digits."""
    if v is None:
        return ""
    if isinstance(v, (bool, np.bool_)):
        return "true" if v else "false"
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if isinstance(v, (float, np.floating)):
        f = float(v)
        if math.isnan(f):
            return ""
        return f"{f:.4g}"
    return str(v)


def _num(v, fmt="{:.3g}", unit=""):
    f = F._float_or_nan(v)
    if not math.isfinite(f):
        return "–"
    return fmt.format(f) + (f" {unit}" if unit else "")


def _n(k, word):
    return f"{k} {word}" + ("" if k == 1 else "s")


def _yes_no(v):
    return {True: "yes", False: "no"}.get(v, "–")


def _table(rows, header=None, cls=""):
    out = [f'<table class="{cls}">' if cls else "<table>"]
    if header:
        out.append("<tr>" + "".join(f"<th>{_esc(h)}</th>" for h in header) + "</tr>")
    for r in rows:
        out.append("<tr>" + "".join(f"<td>{_esc(x)}</td>" for x in r) + "</tr>")
    out.append("</table>")
    return "\n".join(out)


# ----------------------------------------------------------------------------------------------
# sections
# ----------------------------------------------------------------------------------------------
def _timing_text(t):
    """The timing summary of ``map2d assemble`` (``session.json`` key ``timing``) in one line."""
    def g(k):
        v = t.get(k)
        return v if isinstance(v, (int, float)) else float("nan")
    return (f"clock offset {g('offset_s'):.6g} s, drift {g('drift'):.3g}, residual jitter {g('jitter_ms'):.3g} ms; "
            f"{g('matched'):.0f} of {g('onsets'):.0f} onsets timed, {g('late'):.0f} late (frame repeated), "
            f"{g('slips'):.0f} slips, {g('untimed'):.0f} untimed (left out), {g('extra_pulses'):.0f} extra pulses")


def _session_facts(an, session):
    rows = [("cells", str(len(an.cell_ids))), ("responses", an.unit)]
    if session is not None:
        kind = "spikes" if type(session.responses).__name__ == "Spikes" else "imaging traces"
        rows.append(("recording", kind))
    absent = []
    if an.maps is not None:
        g = an.maps.grid
        rows.append(("sparse-noise grid", f"{g.ny} x {g.nx} pixels of {g.dx_deg:g} x {g.dy_deg:g} deg, "
                                          f"centre ({g.center_x_deg:g}, {g.center_y_deg:g}) deg"))
        lags = 1000.0 * np.asarray(an.maps.lags_s, float)
        rows.append(("map lags", f"{lags[0]:.0f} to {lags[-1]:.0f} ms ({lags.size} lags)"))
        if session is not None and session.sparse_noise is not None:
            rows.append(("sparse-noise frames", str(session.sparse_noise.frames.shape[0])))
    else:
        absent.append("No sparse noise: no receptive-field maps, fits, map-grating agreement or size tuning.")
    if an.flashed is not None:
        fl = an.flashed
        rows.append(("flashed gratings", f"{_n(len(fl.orientations_deg), 'orientation')} x "
                                         f"{_n(len(fl.sfs_cpd), 'SF')} "
                                         f"({', '.join(f'{v:.3g}' for v in fl.sfs_cpd)} cycles/deg) x "
                                         f"{_n(len(fl.phases_deg), 'phase')}"))
    if an.drifting is not None:
        dr = an.drifting
        rows.append(("drifting gratings", f"{_n(len(dr.directions_deg), 'direction')} x "
                                          f"{_n(len(dr.sfs_cpd), 'SF')} x {_n(len(dr.tfs_hz), 'TF')}, "
                                          f"{_n(len(dr.trial_onset_s), 'trial')}"))
    timing = getattr(session, "timing", None) if session is not None else None
    if timing:
        rows.append(("frame timing (measured)", _timing_text(timing)))
    if an.phase_origin_deg is not None:
        rows.append(("grating phase origin", f"({an.phase_origin_deg[0]:g}, {an.phase_origin_deg[1]:g}) deg"))
    if an.flashed is None and an.drifting is None:
        absent.append("No gratings: no orientation or spatial-frequency tuning, no F1/F0, no agreement.")
    elif an.flashed is None:
        absent.append("No flashed gratings: no orientation x SF surfaces and no map-grating agreement.")
    elif an.drifting is None:
        absent.append("No drifting gratings: no F1/F0 and no direction tuning.")
    return rows, absent


def _counts(an):
    resp = F.column_bool(an, "responsive")
    gresp = F.column_bool(an, "grating_responsive")
    lin = F.column_bool(an, "linear")
    rows = [("cells", len(an.cell_ids))]
    has_g = an.flashed is not None or an.drifting is not None
    if an.maps is not None:
        rows.append(("responsive to sparse noise", sum(v is True for v in resp)))
    if has_g:
        rows.append(("responsive to gratings", sum(v is True for v in gresp)))
    if an.maps is not None and has_g:       # four groups that add up to every cell
        both = sum(a is True and b is True for a, b in zip(resp, gresp))
        rows += [("\u2003to both", both),
                 ("\u2003to sparse noise only", sum(a is True and b is not True for a, b in zip(resp, gresp))),
                 ("\u2003to gratings only", sum(a is not True and b is True for a, b in zip(resp, gresp))),
                 ("\u2003to neither", sum(a is not True and b is not True for a, b in zip(resp, gresp)))]
    rows += [("called linear", sum(v is True for v in lin)), ("called not linear", sum(v is False for v in lin)),
             ("no linearity call", sum(v is None for v in lin))]
    for col, label in (("polarity", "map polarity"), ("model", "fitted model"),
                       ("grating_class", "drifting-grating class")):
        vals = [v for v in F.column_text(an, col) if v]
        for name in sorted(set(vals)):
            rows.append((f"{label}: {name}", vals.count(name)))
    return rows


def _cell_facts(an, r):
    def f(name):
        return an.cells.get(name, [None] * len(an.cell_ids))[r]

    rows = []
    if an.maps is not None:
        rows += [("responsive (sparse noise)", f"{_yes_no(F._vbool(an, 'responsive', r))}, "
                                               f"p = {_num(f('p_value'), '{:.2g}')}"),
                 ("polarity", F._vtext(an, "polarity", r) or "–"),
                 ("fitted model", F._vtext(an, "model", r) or "–"),
                 ("centre (azimuth, elevation)", f"({_num(f('center_x_deg'), '{:.1f}')}, "
                                                 f"{_num(f('center_y_deg'), '{:.1f}')}) deg"),
                 ("size", _num(f("size_deg"), "{:.2g}", "deg")),
                 ("peak lag", _num(F._float_or_nan(f("peak_lag_s")) * 1000.0, "{:.0f}", "ms")),
                 ("map SNR", _num(f("snr"), "{:.3g}"))]
    if an.flashed is not None or an.drifting is not None:
        ci = F._float_or_nan(f("pref_orientation_ci_halfwidth_deg"))
        ori = _num(f("pref_orientation_deg"), "{:.0f}", "deg")
        if math.isfinite(ci) and ori != "–":
            ori += f" ± {ci:.0f}"
        lo, hi = F._float_or_nan(f("pref_sf_ci_low_cpd")), F._float_or_nan(f("pref_sf_ci_high_cpd"))
        sf = _num(f("pref_sf_cpd"), "{:.3g}", "cycles/deg")
        if math.isfinite(lo) and math.isfinite(hi) and sf != "–":
            sf += f" ({lo:.3g}–{hi:.3g})"
        rows += [("responsive (gratings)", _yes_no(F._vbool(an, "grating_responsive", r))),
                 ("tuning from", F._vtext(an, "tuning_source", r) or "–"),
                 ("preferred orientation", ori), ("preferred SF", sf),
                 ("F1/F0", _num(f("f1_f0"), "{:.2f}")),
                 ("drifting class", F._vtext(an, "grating_class", r) or "–")]
        rows += _levels(an, r)
    if an.forward is not None:
        rows += [("agreement", _num(f("agreement"), "{:.2f}")),
                 ("gratings -> map similarity", _num(f("inverse_similarity"), "{:.2f}"))]
    reason = F._vtext(an, "linear_reason", r)
    rows.append(("linear", _yes_no(F._vbool(an, "linear", r)) + (f" ({reason})" if reason else "")))
    return rows


def _levels(an, r):
    """The reference levels the tuning curves are measured from: blank (flashed) and spontaneous (drifting)."""
    out = []
    cid = int(an.cell_ids[r])
    fl = an.flashed
    if fl is not None:
        k = np.flatnonzero(np.asarray(fl.cell_ids) == cid)
        if k.size:
            k = int(k[0])
            pl = int(fl.peak_lag_index[k])
            bm = np.asarray(fl.blank_mean[k], float)
            if 0 <= pl < bm.size:
                out.append(("blank level (flashed)", _num(bm[pl], "{:.3g}", an.unit)))
    dr = an.drifting
    if dr is not None:
        k = np.flatnonzero(np.asarray(dr.cell_ids) == cid)
        if k.size:
            src = getattr(dr, "spontaneous_source", "")
            out.append(("spontaneous level (drifting)", _num(dr.spontaneous[int(k[0])], "{:.3g}", an.unit)
                        + (f" (from {src})" if src and src != "none" else "")))
    return out


def _all_cells_table(an):
    from ..columns import meaning   # hover text: each column's meaning and unit (docs/columns.md)

    cols = list(an.cells.keys())
    n = len(an.cell_ids)
    out = ['<div class="scroll"><table id="all-cells">',
           "<tr>" + "".join(f'<th title="{_esc(meaning(c))}">{_esc(c)}</th>' for c in cols) + "</tr>"]
    columns = [an.cells[c] for c in cols]
    escaped: dict = {}            # texts repeat down a column: each escaped once
    for r in range(n):
        cells = []
        for col in columns:
            v = col[r] if r < len(col) else None
            t = _cell_text(v)
            num = isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, (bool, np.bool_))
            if num:             # digits, sign, point, exponent or "inf": nothing to escape
                cells.append(f'<td class="num">{t}</td>')
                continue
            e = escaped.get(t)
            if e is None:
                e = escaped[t] = _esc(t)
            if len(t) > 30:
                cells.append(f'<td title="{e}">{e}</td>')
            else:
                cells.append(f"<td>{e}</td>")
        out.append("<tr>" + "".join(cells) + "</tr>")
    out.append("</table></div>")
    return "\n".join(out)




def _index_table(an):
    """The cell index: one row per cell, ``id="cell-<id>"``; ``data-v`` holds the value for sorting."""
    cols = D.index_columns(an)
    vals = D.index_values(an, cols)
    out = ['<div id="index-scroll"><table id="index"><thead><tr>']
    for c, head, kind, text in cols:
        out.append(f'<th data-col="{_esc(c)}" data-kind="{kind}" title="{_esc(text)}">{_esc(head)}</th>')
    out.append("</tr></thead><tbody>")
    for r, row in enumerate(vals):
        cid = int(an.cell_ids[r])
        tds = []
        for (c, _, kind, _), v in zip(cols, row):
            if v is None:
                tds.append('<td data-v=""></td>')
            elif kind == "bool":
                tds.append(f'<td data-v="{"true" if v else "false"}">{"yes" if v else "no"}</td>')
            elif kind in ("num", "int"):
                tds.append(f'<td class="num" data-v="{v!r}">{_esc(_num(v, "{:.3g}") if kind == "num" else v)}</td>')
            else:
                tds.append(f'<td data-v="{_esc(v)}">{_esc(v)}</td>')
        out.append(f'<tr id="cell-{cid}">' + "".join(tds) + "</tr>")
    out.append("</tbody></table></div>")
    return "\n".join(out)


def _quick_filters(an):
    opts = []
    if an.maps is not None:
        opts.append(("responsive", "map", (("true", "yes"), ("false", "no"))))
    if an.flashed is not None or an.drifting is not None:
        opts.append(("grating_responsive", "gratings", (("true", "yes"), ("false", "no"))))
    opts.append(("linear", "linear", (("true", "yes"), ("false", "no"), ("none", "no call"))))
    out = []
    for col, label, choices in opts:
        out.append(f'<label>{_esc(label)}: <select class="quick" data-col="{col}"><option value="">any</option>'
                   + "".join(f'<option value="{v}">{_esc(t)}</option>' for v, t in choices) + "</select></label>")
    return "".join(out)


def _script_json(obj_text):
    """JSON text safe inside a <script> element: every "<" (only ever inside JSON strings) as \\u003c."""
    return obj_text.replace("<", "\\u003c")


# ----------------------------------------------------------------------------------------------
# the page
# ----------------------------------------------------------------------------------------------
def render_report(analysis, session=None) -> str:
    """The whole report as one HTML string (see the module notes).

    Parameters
    ----------
    analysis : map2d.analysis.Analysis
    session : map2d.contract.Session, optional
        Adds what only the session knows (recording kind, frame count, the loader's notes, the ROI
        label image of an imaging session).

    Returns
    -------
    str
    """
    from .. import __version__

    an = analysis
    name = an.session_name or "session"
    n = len(an.cell_ids)
    has_fov = session is not None and getattr(session, "rois", None) is not None
    parts = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
             '<meta name="viewport" content="width=device-width, initial-scale=1">',
             f"<title>map2d report: {_esc(name)}</title>", f"<style>{_CSS}</style></head><body>",
             f"<header><h1>Receptive fields of {_esc(name)}</h1>"
             f"<p>map2d {_esc(__version__)} &middot; {n} cells &middot; responses in {_esc(an.unit)}</p>"
             '<nav><a href="#s-session">session</a><a href="#s-population">population</a>'
             + ('<a href="#s-fov">field of view</a>' if has_fov else "")
             + '<a href="#s-cells">cells</a><a href="#s-table">all columns</a></nav></header><main>']

    facts, absent = _session_facts(an, session)
    parts.append("<h2 id='s-session'>Session and counts</h2><div class='facts'>")
    parts.append(_table(facts, header=("what", "value")))
    parts.append(_table(_counts(an), header=("cells", "count")))
    parts.append("</div>")
    notes = list(an.notes) + (list(getattr(session, "notes", []) or []) if session is not None else [])
    if absent or notes:
        parts.append("<h2>Notes</h2><ul>")
        parts += [f'<li class="absent">{_esc(a)}</li>' for a in absent]
        parts += [f"<li>{_esc(x)}</li>" for x in notes]
        parts.append("</ul>")

    parts.append("<h2 id='s-population'>Population</h2>")
    if an.maps is None:
        parts.append("<p class='absent'>No receptive-field map over the visual field: the session has no "
                     "sparse noise.</p>")
    parts.append('<div id="population"></div>')
    if has_fov:
        parts.append("<h2 id='s-fov'>Field of view</h2><p>Each ROI painted with its cell's value (grey: no "
                     "value; dark: background), numbered with its cell id; click an ROI to open the cell. "
                     "The same maps are in fov.tif and the fov_*.png files.</p>"
                     '<div id="fov-props"></div><div id="fov-wrap"><div id="fov-map"></div>'
                     '<div id="fov-bar"></div></div>'
                     "<h3 style='margin-top:14px'>Retinotopy</h3><div id=\"retinotopy\"></div>")

    parts.append("<h2 id='s-cells'>Cells</h2>")
    parts.append("<p>Every cell has a row in the index; click a row (or a receptive field, a point or an ROI "
                 "above) to draw its panel below the index, and step through the rows shown with the "
                 "previous / next buttons or the keys p / n. Click a heading to sort. Filter with words "
                 "(any cell text) and conditions on the headings, e.g. <code>agreement&gt;0.5 "
                 "SF&lt;0.1 polarity=ON-centre</code>. Hover a heading for its meaning.</p>")
    parts.append('<div class="controls"><input id="filter" type="search" placeholder="filter: words or '
                 'heading&gt;value, heading=value" aria-label="filter the cell index">'
                 + _quick_filters(an) + f'<span id="shown">{n} of {n} cells shown</span></div>')
    parts.append(_index_table(an))
    parts.append('<section id="viewer" aria-live="polite"><p>Select a cell in the index.</p></section>')
    parts.append("<p>Panel: maps at the peak lag on one colour scale (change in response after a bright or "
                 "dark spot on that pixel; outline: fitted receptive field, 1 s.d.; white ring: the pixel of "
                 "the time course). Measured and predicted first-harmonic magnitude |H| share one colour "
                 "scale; the prediction is drawn plainly only for cells called linear. The map rebuilt from "
                 "the gratings holds only the tested orientations and spatial frequencies, so it is "
                 "band-limited: rings around the field are the missing frequencies, not the cell; it is "
                 "compared with the measured map limited to the same band. Tuning curves: points with "
                 "error bars of 1 s.e.m., fitted von Mises curve for orientation, preferred SF with its "
                 "95% interval (shaded) for SF; the horizontal line is the blank (flashed) or spontaneous "
                 "(drifting) level, the zero of the responses. (n.s.): not significant.</p>")
    for r in range(n):
        cid = int(an.cell_ids[r])
        parts.append(f'<template id="facts-{cid}">{_table(_cell_facts(an, r))}</template>')

    parts.append("<h2 id='s-table'>All cells</h2><details><summary>The contents of cells.csv (empty: not "
                 "estimated; hover a long value to read it whole)</summary>")
    parts.append(_all_cells_table(an))
    parts.append("</details></main>")
    session_json = json.dumps(D.session_payload(an, session), separators=(",", ":"), allow_nan=False)
    payloads = D.cell_payloads(an)
    cells_json = "{" + ",".join(f'"{cid}":{txt}' for cid, txt in payloads.items()) + "}"
    parts.append(f'<script type="application/json" id="m2d-session">{_script_json(session_json)}</script>')
    parts.append(f'<script type="application/json" id="m2d-cells">{_script_json(cells_json)}</script>')
    parts.append(f"<script>{_JS_FILE.read_text(encoding='utf-8')}</script>")
    parts.append("</body></html>")
    return "\n".join(parts)


def write_report(folder, analysis, session=None) -> Path:
    """Write ``report.html`` into ``folder`` and return its path (see :func:`render_report`)."""
    path = Path(folder) / REPORT_FILE
    path.write_text(render_report(analysis, session), encoding="utf-8")
    return path
