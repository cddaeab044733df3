"""The live page of ``map2d watch``: one self-contained HTML file that the browser reloads.

The page holds its data (maps quantised to 8 bits, per-cell numbers, the aperture suggestion) and
draws them with a few lines of script on canvases; ``<meta http-equiv="refresh">`` reloads it, and
the file is replaced atomically, so a reload never sees half a page. No server and no network.
"""

from __future__ import annotations

import base64
import html
import json
import os
from pathlib import Path

import numpy as np

from ..maps import KINDS

__all__ = ["live_page_data", "write_live_page"]


def _best_lag(result, c):
    """The cell's peak lag when responsive, else the lag of its largest |z| (-1 when none)."""
    li = int(result.peak_lag_index[c])
    if li >= 0:
        return li
    z = np.stack([np.abs(result.zmaps(k)[c]) for k in KINDS])          # (3, L, ny, nx)
    per = np.nanmax(np.where(np.isfinite(z), z, -np.inf), axis=(0, 2, 3))
    return int(np.argmax(per)) if np.isfinite(per).any() else -1


def live_page_data(result, aperture=None, info=None) -> dict:
    """The page's data: per cell its numbers and ON/OFF/linear maps at the best lag (int8, scaled)."""
    from ..live import field_region

    g = result.grid
    ny, nx = g.shape
    cells, blobs = [], []
    kinds = result.peak_kind_index()
    for c in range(result.n_cells):
        li = _best_lag(result, c)
        maps = np.zeros((3, ny, nx), np.float32) if li < 0 else np.stack(
            [result.maps(k)[c, li] for k in KINDS])
        finite = np.isfinite(maps)
        scale = float(np.max(np.abs(maps[finite]))) if finite.any() else 0.0
        q = np.zeros(maps.shape, np.int8) if scale == 0 else np.rint(
            np.where(finite, maps, 0) / scale * 127).astype(np.int8)
        blobs.append(q.tobytes())
        region = field_region(result, c, kinds) if result.responsive[c] else None
        z = result.max_abs_z[c]
        cells.append({
            "id": int(result.cell_ids[c]), "responsive": bool(result.responsive[c]),
            "z": None if not np.isfinite(z) else round(float(z), 2),
            "z_critical": None if not np.isfinite(result.z_critical[c]) else round(float(result.z_critical[c]), 2),
            "p": None if not np.isfinite(result.p_value[c]) else float(f"{result.p_value[c]:.3g}"),
            "lag_s": None if li < 0 else round(float(result.lags_s[li]), 4),
            "polarity": str(result.polarity[c]), "scale": float(f"{scale:.3g}"),
            "field": [] if region is None else np.flatnonzero(region[0]).tolist()})
    data = {"ny": ny, "nx": nx, "unit": result.unit,
            "extent": [float(v) for v in g.extent_deg],
            "cells": cells, "maps": base64.b64encode(b"".join(blobs)).decode("ascii"),
            "info": info or {}}
    if aperture is not None:
        data["aperture"] = {"x": aperture.center_x_deg, "y": aperture.center_y_deg,
                            "d": aperture.diameter_deg, "se": list(aperture.center_se_deg),
                            "d_se": aperture.diameter_se_deg, "cells": list(aperture.cells),
                            "command": aperture.command()}
    return data


_SCRIPT = r"""
const D = JSON.parse(document.getElementById('live-data').textContent);
const bytes = Uint8Array.from(atob(D.maps), c => c.charCodeAt(0));
const P = D.ny * D.nx;
function colour(v) {            // v in -1..1: dark blue .. white .. dark red
  const a = Math.min(1, Math.abs(v));
  return v >= 0 ? [255, Math.round(255 * (1 - 0.8 * a)), Math.round(255 * (1 - a))]
                : [Math.round(255 * (1 - a)), Math.round(255 * (1 - 0.6 * a)), 255];
}
function drawMap(canvas, off) {
  const img = canvas.getContext('2d').createImageData(D.nx, D.ny);
  for (let i = 0; i < P; i++) {
    let b = bytes[off + i]; if (b > 127) b -= 256;
    const [r, g, bl] = colour(b / 127);
    img.data.set([r, g, bl, 255], 4 * i);
  }
  canvas.getContext('2d').putImageData(img, 0, 0);
}
const list = document.getElementById('cells');
const order = D.cells.map((c, i) => i).sort((a, b) =>
  (D.cells[b].responsive - D.cells[a].responsive) || ((D.cells[b].z || 0) - (D.cells[a].z || 0)));
for (const i of order) {
  const c = D.cells[i];
  const div = document.createElement('div');
  div.className = 'cell' + (c.responsive ? ' yes' : '');
  div.id = 'cell-' + c.id;
  div.innerHTML = '<b>cell ' + c.id + '</b> ' + (c.responsive ? 'responsive' : 'not yet') +
    '<br>max |z| ' + (c.z === null ? '-' : c.z) + ' (needs ' + (c.z_critical === null ? '-' : c.z_critical) +
    '), p ' + (c.p === null ? '-' : c.p) + '<br>lag ' + (c.lag_s === null ? '-' : c.lag_s + ' s') +
    ', scale &plusmn;' + c.scale + ' ' + D.unit + '<br>';
  ['ON', 'OFF', 'linear'].forEach((k, j) => {
    const fig = document.createElement('figure');
    const cv = document.createElement('canvas');
    cv.width = D.nx; cv.height = D.ny; cv.className = 'map';
    fig.appendChild(cv);
    const cap = document.createElement('figcaption'); cap.textContent = k; fig.appendChild(cap);
    div.appendChild(fig);
    drawMap(cv, (3 * i + j) * P);
  });
  list.appendChild(div);
}
// population mosaic: every responsive cell's field, and the suggested aperture, in degrees
const mc = document.getElementById('mosaic');
const ctx = mc.getContext('2d');
const [x0, x1, y0, y1] = D.extent;
const ml = 46, mr = 10, mt = 10, mb = 38;
const W = mc.width - ml - mr, H = mc.height - mt - mb;
const sx = W / (x1 - x0), sy = H / (y1 - y0);
const X = x => ml + (x - x0) * sx, Y = y => mt + (y1 - y) * sy;
const dx = (x1 - x0) / D.nx, dy = (y1 - y0) / D.ny;
ctx.fillStyle = '#fff'; ctx.fillRect(0, 0, mc.width, mc.height);
ctx.fillStyle = '#f4f4f0'; ctx.fillRect(ml, mt, W, H);
ctx.strokeStyle = '#999'; ctx.strokeRect(ml, mt, W, H);
const span = Math.max(x1 - x0, y1 - y0);
const step = span > 60 ? 20 : span > 25 ? 10 : 5;
ctx.fillStyle = '#333'; ctx.font = '12px sans-serif'; ctx.textAlign = 'center';
for (let v = Math.ceil(x0 / step) * step; v <= x1; v += step) {
  ctx.fillRect(X(v), mt + H, 1, 5); ctx.fillText(String(v), X(v), mt + H + 17);
}
ctx.fillText('azimuth (deg)', ml + W / 2, mc.height - 4);
ctx.textAlign = 'right';
for (let v = Math.ceil(y0 / step) * step; v <= y1; v += step) {
  ctx.fillRect(ml - 5, Y(v), 5, 1); ctx.fillText(String(v), ml - 7, Y(v) + 4);
}
ctx.save(); ctx.translate(12, mt + H / 2); ctx.rotate(-Math.PI / 2); ctx.textAlign = 'center';
ctx.fillText('elevation (deg)', 0, 0); ctx.restore();
ctx.textAlign = 'left';
const hues = [12, 200, 95, 280, 45, 160, 330, 240];
D.cells.forEach((c, n) => {
  if (!c.field.length) return;
  const h = hues[n % hues.length];
  ctx.fillStyle = 'hsla(' + h + ',70%,45%,0.30)';
  let cxs = 0, cys = 0;
  for (const p of c.field) {
    const i = Math.floor(p / D.nx), j = p % D.nx;
    ctx.fillRect(ml + j * dx * sx, mt + i * dy * sy, dx * sx, dy * sy);
    cxs += ml + (j + 0.5) * dx * sx; cys += mt + (i + 0.5) * dy * sy;
  }
  ctx.fillStyle = '#222'; ctx.font = '12px sans-serif';
  ctx.fillText(String(c.id), cxs / c.field.length - 4, cys / c.field.length + 4);
});
if (D.aperture) {
  const a = D.aperture;
  ctx.strokeStyle = '#111'; ctx.lineWidth = 2; ctx.setLineDash([6, 4]);
  ctx.beginPath();
  ctx.ellipse(X(a.x), Y(a.y), a.d / 2 * sx, a.d / 2 * sy, 0, 0, 2 * Math.PI);
  ctx.stroke();
}
"""

_STYLE = """
body { font: 14px/1.4 sans-serif; margin: 16px; color: #222; }
h1 { font-size: 20px; margin: 0 0 6px 0; }
.summary { margin: 6px 0 12px 0; }
.cell { display: inline-block; vertical-align: top; border: 1px solid #ccc; border-radius: 4px;
        padding: 6px; margin: 4px; width: 330px; font-size: 13px; }
.cell.yes { border-color: #b5542d; }
figure { display: inline-block; margin: 4px 4px 0 0; }
figcaption { text-align: center; font-size: 12px; }
canvas.map { width: 100px; image-rendering: pixelated; border: 1px solid #ddd; }
code { background: #f2f2f2; padding: 2px 4px; }
#mosaic { width: 520px; }
"""


def write_live_page(path, data: dict, refresh_s: float = 2.0, version: int = 0, final: bool = False) -> Path:
    """Write the page atomically (a temporary file renamed over ``path``)."""
    path = Path(path)
    info = data.get("info", {})
    n_resp = sum(c["responsive"] for c in data["cells"])
    title = "map2d watch: " + html.escape(str(info.get("folder", "")))
    state = "final (recording ended)" if final else "live"
    a = data.get("aperture")
    if a is None:
        apert = "<p>Aperture: no responsive cell yet.</p>"
    else:
        apert = (f"<p>Aperture for cells {', '.join(map(str, a['cells']))}: centre "
                 f"({a['x']:.1f} &plusmn; {a['se'][0]:.1f}, {a['y']:.1f} &plusmn; {a['se'][1]:.1f}) deg, "
                 f"diameter {a['d']:.1f} &plusmn; {a['d_se']:.1f} deg<br><code id=\"command\">"
                 f"{html.escape(a['command'])}</code></p>")
    refresh = "" if final else f'<meta http-equiv="refresh" content="{float(refresh_s):g}">'
    ar = (data["extent"][3] - data["extent"][2]) / (data["extent"][1] - data["extent"][0])
    payload = json.dumps(data).replace("</", "<\\/")
    text = f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">{refresh}<title>{title}</title>
<style>{_STYLE}</style></head>
<body id="live" data-version="{int(version)}" data-state="{state}">
<h1>{title}</h1>
<div class="summary" id="summary">{state}: {info.get('recorded_s', 0):.1f} s recorded,
{info.get('frames', 0)} frames, {info.get('spikes', 0)} {info.get('data_kind', 'spikes')}; <span id="n-responsive">{n_resp}</span> of
{len(data['cells'])} cells responsive (live call, alpha {info.get('alpha', 0.01)}); updated
{html.escape(str(info.get('updated', '')))} (update {int(version)}).{html.escape(str(info.get('note', '')))}</div>
{apert}
<canvas id="mosaic" width="520" height="{max(int(464 * ar), 60) + 48}"></canvas>
<div id="cells"></div>
<script type="application/json" id="live-data">{payload}</script>
<script>{_SCRIPT}</script>
</body></html>
"""
    tmp = path.parent / f".{path.name}.partial-{os.getpid()}"
    tmp.write_text(text, encoding="utf-8")
    os.replace(tmp, path)
    return path
