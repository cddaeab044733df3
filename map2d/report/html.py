"""``report.html``: one self-contained page (figures embedded as PNG data URIs, no scripts, no links out).

Layout: what the session holds and what was absent, counts, notes, the summary figures, a panel per
cell (key values beside the figure) for the cells that respond, and the whole ``cells.csv`` table.
Figures come from :mod:`map2d.report.figures`.
"""

from __future__ import annotations

import html
import math
from pathlib import Path

import numpy as np

from .._forked import ForkedCall
from . import figures as F

__all__ = ["write_report", "render_report", "REPORT_FILE", "DEFAULT_MAX_CELLS"]

REPORT_FILE = "report.html"
#: Most cell panels in one report. Measured on a 500-cell simulated session (2-core machine, shared):
#: about 0.25 s of CPU per panel, so 30 panels plus the summary and table take about 8 s of CPU (about
#: 4 s on two cores: half of the panels are drawn in a forked child process).
DEFAULT_MAX_CELLS = 30

_CSS = """
body { font-family: system-ui, -apple-system, 'Segoe UI', sans-serif; margin: 0; color: #1f2328;
       background: #f6f5f1; }
header { background: #24414a; color: #f6f5f1; padding: 18px 28px; }
header h1 { margin: 0 0 4px 0; font-size: 22px; font-weight: 600; }
header p { margin: 0; font-size: 13px; opacity: 0.85; }
main { padding: 8px 28px 40px 28px; max-width: 1500px; }
h2 { font-size: 18px; margin: 28px 0 8px 0; border-bottom: 2px solid #c9c3b4; padding-bottom: 4px; }
h3 { font-size: 15px; margin: 0 0 6px 0; }
p, li { font-size: 14px; line-height: 1.45; max-width: 1100px; }
table { border-collapse: collapse; font-size: 12.5px; }
td, th { padding: 2px 8px; border-bottom: 1px solid #e0dccf; text-align: left; vertical-align: top; }
th { background: #ebe7dc; font-weight: 600; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
.facts { display: flex; flex-wrap: wrap; gap: 28px; }
.absent { color: #7a3b2e; }
figure { margin: 10px 0 18px 0; background: #ffffff; padding: 8px; border: 1px solid #ddd8ca;
         display: inline-block; }
figure img { display: block; max-width: 100%; height: auto; }
figcaption { font-size: 12.5px; color: #444; max-width: 950px; margin-top: 4px; }
section.cell { display: flex; flex-wrap: wrap; gap: 14px; align-items: flex-start; background: #fbfaf7;
               border: 1px solid #ddd8ca; padding: 10px; margin: 14px 0; }
section.cell table { min-width: 250px; }
section.cell figure { margin: 0; }
nav.cells a { display: inline-block; margin: 0 8px 4px 0; font-size: 13px; color: #24414a; }
.scroll { overflow: auto; max-height: 640px; border: 1px solid #ddd8ca; background: #ffffff; }
.scroll table th { position: sticky; top: 0; }
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


def _figure(fig_id, fig, caption, alt):
    data = F.figure_png_base64(fig)
    cap = f"<figcaption>{_esc(caption)}</figcaption>" if caption else ""
    return (f'<figure id="{_esc(fig_id)}"><img alt="{_esc(alt)}" '
            f'src="data:image/png;base64,{data}">{cap}</figure>')


# ----------------------------------------------------------------------------------------------
# sections
# ----------------------------------------------------------------------------------------------
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
    if an.maps is not None:
        rows.append(("responsive to sparse noise", sum(v is True for v in resp)))
    if an.flashed is not None or an.drifting is not None:
        rows.append(("responsive to gratings", sum(v is True for v in gresp)))
    if an.maps is not None and (an.flashed is not None or an.drifting is not None):
        rows.append(("responsive to both", sum(a is True and b is True for a, b in zip(resp, gresp))))
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
    if an.forward is not None:
        rows += [("agreement", _num(f("agreement"), "{:.2f}")),
                 ("gratings -> map similarity", _num(f("inverse_similarity"), "{:.2f}"))]
    reason = F._vtext(an, "linear_reason", r)
    rows.append(("linear", _yes_no(F._vbool(an, "linear", r)) + (f" ({reason})" if reason else "")))
    return rows


def _all_cells_table(an):
    from ..columns import meaning   # hover text: each column's meaning and unit (docs/columns.md)

    cols = list(an.cells.keys())
    n = len(an.cell_ids)
    out = ['<div class="scroll"><table>',
           "<tr>" + "".join(f'<th title="{_esc(meaning(c))}">{_esc(c)}</th>' for c in cols) + "</tr>"]
    columns = [an.cells[c] for c in cols]
    for r in range(n):
        cells = []
        for col in columns:
            v = col[r] if r < len(col) else None
            t = _cell_text(v)
            num = isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, (bool, np.bool_))
            cells.append(f'<td class="num">{_esc(t)}</td>' if num else f"<td>{_esc(t)}</td>")
        out.append("<tr>" + "".join(cells) + "</tr>")
    out.append("</table></div>")
    return "\n".join(out)


# ----------------------------------------------------------------------------------------------
# the page
# ----------------------------------------------------------------------------------------------
def render_report(analysis, session=None, max_cells="default") -> str:
    """The whole report as one HTML string.

    Parameters
    ----------
    analysis : map2d.analysis.Analysis
    session : map2d.contract.Session, optional
        Adds what only the session knows (recording kind, frame count, the loader's notes).
    max_cells : int or None
        Most cell panels (:func:`map2d.report.figures.select_cells` chooses which); None for all;
        by default :data:`DEFAULT_MAX_CELLS`.

    Returns
    -------
    str
    """
    from .. import __version__

    if isinstance(max_cells, str) and max_cells == "default":
        max_cells = DEFAULT_MAX_CELLS
    an = analysis
    name = an.session_name or "session"
    parts = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
             f"<title>map2d report: {_esc(name)}</title>", f"<style>{_CSS}</style></head><body>",
             f"<header><h1>Receptive fields of {_esc(name)}</h1>"
             f"<p>map2d {_esc(__version__)} &middot; {len(an.cell_ids)} cells &middot; responses in "
             f"{_esc(an.unit)}</p></header><main>"]

    facts, absent = _session_facts(an, session)
    parts.append("<h2>Session and counts</h2><div class='facts'>")
    parts.append(_table(facts, header=("what", "value")))
    parts.append(_table(_counts(an), header=("cells", "count")))
    parts.append("</div>")
    notes = list(an.notes) + (list(getattr(session, "notes", []) or []) if session is not None else [])
    if absent or notes:
        parts.append("<h2>Notes</h2><ul>")
        parts += [f'<li class="absent">{_esc(a)}</li>' for a in absent]
        parts += [f"<li>{_esc(n)}</li>" for n in notes]
        parts.append("</ul>")

    rows, n_qual = F.select_cells(an, max_cells)
    # the second half of the cell panels is drawn in a forked child while this process draws the
    # summary and the first half (rendering is most of the report's time)
    half = len(rows) // 2 if len(rows) >= _FORK_MIN_PANELS else len(rows)
    child = _Forked(lambda: _cell_sections(an, rows[half:]), enabled=half < len(rows))

    parts.append("<h2>Summary</h2>")
    summary = F.summary_figures(an)
    if an.maps is None:
        parts.append("<p class='absent'>No receptive-field map over the visual field: the session has no "
                     "sparse noise.</p>")
    for fig_id, caption, fig in summary:
        parts.append(_figure(fig_id, fig, caption, alt=fig_id.replace("fig-", "").replace("-", " ")))
    del summary

    parts.append("<h2>Cells</h2>")
    if n_qual == 0:
        parts.append("<p>No cell responds significantly to sparse noise or gratings, so there are no cell "
                     "panels. Every cell is in the table below.</p>")
    else:
        omitted = n_qual - len(rows)
        text = (f"{n_qual} cells respond to sparse noise or gratings"
                + (f"; panels for {len(rows)} of them, {omitted} omitted to keep the report quick to make "
                   "and to read. The panels go to cells responsive to both stimuli first, then to sparse "
                   "noise only, then to gratings only; within each group the strongest map (signal-to-noise "
                   "ratio) or grating response (p-value) first." if omitted else "; each has a panel.")
                + " Panels are in cell-id order; every cell is in the table at the end.")
        parts.append(f"<p>{_esc(text)}</p>")
        parts.append("<p>Each panel: maps at the peak lag (colour: change in response after a bright or dark "
                     "spot on that pixel; outline: fitted receptive field, 1 s.d.) and their time course at the "
                     "strongest pixel; measured and predicted first-harmonic magnitude |H| over orientation and "
                     "spatial frequency, and the map rebuilt from the gratings beside the measured map limited "
                     "to the same band of spatial frequencies; orientation and spatial-frequency tuning (points: "
                     "measured, line: fit); size tuning predicted from the map for bright disks and annuli; "
                     "the spread of flashed-grating responses over lag. (n.s.): not significant.</p>")
        parts.append("<nav class='cells'>" + "".join(
            f'<a href="#cell-{int(an.cell_ids[r])}">cell {int(an.cell_ids[r])}</a>' for r in rows) + "</nav>")
        parts += _cell_sections(an, rows[:half])
        parts += child.result() if half < len(rows) else []

    parts.append("<h2>All cells</h2><p>The contents of cells.csv (empty: not estimated).</p>")
    parts.append(_all_cells_table(an))
    parts.append("</main></body></html>")
    return "\n".join(parts)


#: Fewest cell panels for which half of them are drawn in a second process.
_FORK_MIN_PANELS = 6


def _cell_sections(an, rows):
    """The HTML sections (facts and panel) of the cells in ``rows``, drawn on one reused Figure."""
    out = []
    if len(rows) == 0:
        return out
    panels = F.CellPanels(an)
    for r in rows:
        cid = int(an.cell_ids[r])
        fig = panels.draw(r)
        out.append(f'<section class="cell" id="cell-{cid}"><div><h3>Cell {cid}</h3>'
                   + _table(_cell_facts(an, r)) + "</div>"
                   + _figure(f"fig-cell-{cid}", fig, None, alt=f"panel of cell {cid}") + "</section>")
    return out


_Forked = ForkedCall  # the shared helper (map2d._forked)


def write_report(folder, analysis, session=None, max_cells="default") -> Path:
    """Write ``report.html`` into ``folder`` and return its path (see :func:`render_report`)."""
    path = Path(folder) / REPORT_FILE
    path.write_text(render_report(analysis, session, max_cells=max_cells), encoding="utf-8")
    return path
