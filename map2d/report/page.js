/* map2d report: draws every figure of report.html from the arrays embedded in the page.
   No network, no libraries: SVG markup built as strings, maps painted on a canvas.
   Data: #m2d-session (axes, units, summary columns, field of view), #m2d-cells (one object per cell,
   decoded only when the cell is opened). */
(function () {
"use strict";
var S = JSON.parse(document.getElementById("m2d-session").textContent);
var CELLS = JSON.parse(document.getElementById("m2d-cells").textContent);
var LUT = S.cmaps;
var UNIT = S.unit;
var ROW_OF = {};
S.ids.forEach(function (id, r) { ROW_OF[id] = r; });
var CALL_COL = {yes: "#1f7a8c", no: "#c0392b", none: "#8a8a8a"};

/* ---------- small utilities ---------- */
function esc(t) {
  return String(t).replace(/&/g, "&amp;").replace(/</g, "&lt;").replace(/>/g, "&gt;").replace(/"/g, "&quot;");
}
function fin(v) { return v !== null && v !== undefined && isFinite(v); }
function fmt(v, d) {
  if (!fin(v)) return "\u2013";
  var a = Math.abs(v);
  if (a !== 0 && (a < 1e-3 || a >= 1e5)) return v.toExponential(1);
  return Number(v.toPrecision(d || 3)).toString();
}
function unpack(p) {
  var bin = atob(p.q), n = bin.length / 2, out = new Float32Array(n), k = p.m / 32000;
  for (var i = 0; i < n; i++) {
    var v = bin.charCodeAt(2 * i) | (bin.charCodeAt(2 * i + 1) << 8);
    if (v >= 32768) v -= 65536;
    out[i] = v === -32768 ? NaN : v * k;
  }
  return out;
}
function lutColour(lut, t) {
  if (!isFinite(t)) return null;
  t = Math.max(0, Math.min(1, t));
  return lut[Math.round(t * (lut.length - 1))];
}
function hexRgb(h) { return [parseInt(h.substr(1, 2), 16), parseInt(h.substr(3, 2), 16), parseInt(h.substr(5, 2), 16)]; }
function niceTicks(lo, hi, n) {
  if (!(hi > lo)) { hi = lo + 1; }
  var span = hi - lo, step = Math.pow(10, Math.floor(Math.log10(span / n))), err = span / n / step;
  if (err >= 7.5) step *= 10; else if (err >= 3.5) step *= 5; else if (err >= 1.5) step *= 2;
  var out = [], t = Math.ceil(lo / step - 1e-9) * step;
  for (; t <= hi + step * 1e-9; t += step) out.push(Math.abs(t) < step * 1e-9 ? 0 : t);
  return out;
}
function range(vals, pad, incl) {
  var lo = Infinity, hi = -Infinity;
  vals.forEach(function (v) { if (fin(v)) { lo = Math.min(lo, v); hi = Math.max(hi, v); } });
  (incl || []).forEach(function (v) { lo = Math.min(lo, v); hi = Math.max(hi, v); });
  if (lo === Infinity) { lo = 0; hi = 1; }
  if (hi === lo) { lo -= 0.5; hi += 0.5; }
  var p = (hi - lo) * (pad === undefined ? 0.08 : pad);
  return [lo - p, hi + p];
}
var ORI_TICKS = [0, 45, 90, 135, 180];

/* ---------- SVG plot ---------- */
function Plot(w, h, o) {
  o = o || {};
  this.w = w; this.h = h;
  this.m = {l: o.l || 58, r: o.r || 14, t: o.t || 26, b: o.b || 44};
  this.xr = o.x || [0, 1]; this.yr = o.y || [0, 1];
  this.xlog = !!o.xlog; this.ylog = !!o.ylog;
  this.parts = []; this.over = [];
  this.equal = !!o.equal;
  if (this.equal) {                       /* same scale on both axes: widen the short range */
    var pw = w - this.m.l - this.m.r, ph = h - this.m.t - this.m.b;
    var sx = (this.xr[1] - this.xr[0]) / pw, sy = (this.yr[1] - this.yr[0]) / ph, s = Math.max(sx, sy);
    var cx = (this.xr[0] + this.xr[1]) / 2, cy = (this.yr[0] + this.yr[1]) / 2;
    this.xr = [cx - s * pw / 2, cx + s * pw / 2]; this.yr = [cy - s * ph / 2, cy + s * ph / 2];
  }
}
Plot.prototype.X = function (v) {
  var a = this.xr[0], b = this.xr[1];
  if (this.xlog) { v = Math.log(v); a = Math.log(a); b = Math.log(b); }
  return this.m.l + (v - a) / (b - a) * (this.w - this.m.l - this.m.r);
};
Plot.prototype.Y = function (v) {
  var a = this.yr[0], b = this.yr[1];
  if (this.ylog) { v = Math.log(v); a = Math.log(a); b = Math.log(b); }
  return this.h - this.m.b - (v - a) / (b - a) * (this.h - this.m.t - this.m.b);
};
Plot.prototype.add = function (s) { this.parts.push(s); return this; };
Plot.prototype.line = function (xs, ys, col, o) {
  o = o || {};
  var d = "", pen = false;
  for (var i = 0; i < xs.length; i++) {
    if (!fin(xs[i]) || !fin(ys[i])) { pen = false; continue; }
    d += (pen ? "L" : "M") + this.X(xs[i]).toFixed(1) + " " + this.Y(ys[i]).toFixed(1);
    pen = true;
  }
  return this.add('<path d="' + d + '" fill="none" stroke="' + col + '" stroke-width="' + (o.lw || 1.6) + '"' +
    (o.dash ? ' stroke-dasharray="' + o.dash + '"' : "") + (o.op ? ' opacity="' + o.op + '"' : "") + "/>");
};
Plot.prototype.pts = function (xs, ys, col, o) {
  o = o || {};
  var s = "";
  for (var i = 0; i < xs.length; i++) {
    if (!fin(xs[i]) || !fin(ys[i])) continue;
    var attr = o.cells ? ' data-cell="' + o.cells[i] + '" class="pick"' : "";
    var c = o.cols ? o.cols[i] : col;
    s += '<circle cx="' + this.X(xs[i]).toFixed(1) + '" cy="' + this.Y(ys[i]).toFixed(1) + '" r="' + (o.r || 3.2) +
      '" fill="' + (o.hollow ? "none" : c) + '" stroke="' + (o.stroke || c) + '" stroke-width="' + (o.sw || 1) + '"' + attr + ">" +
      (o.tips ? "<title>" + esc(o.tips[i]) + "</title>" : "") + "</circle>";
  }
  return this.add(s);
};
Plot.prototype.err = function (xs, ys, es, col) {
  var s = "";
  for (var i = 0; i < xs.length; i++) {
    if (!fin(xs[i]) || !fin(ys[i]) || !fin(es[i])) continue;
    var x = this.X(xs[i]).toFixed(1), a = this.Y(ys[i] - es[i]).toFixed(1), b = this.Y(ys[i] + es[i]).toFixed(1);
    s += '<path d="M' + x + " " + a + "L" + x + " " + b + "M" + (x - 3) + " " + a + "h6M" + (x - 3) + " " + b + 'h6" stroke="' + col + '" stroke-width="1.2"/>';
  }
  return this.add(s);
};
Plot.prototype.hline = function (v, col, o) {
  o = o || {};
  if (!fin(v) || v < Math.min(this.yr[0], this.yr[1]) || v > Math.max(this.yr[0], this.yr[1])) return this;
  var y = this.Y(v).toFixed(1);
  this.add('<path d="M' + this.m.l + " " + y + "H" + (this.w - this.m.r) + '" stroke="' + col + '" stroke-width="' + (o.lw || 1) + '"' +
    (o.dash ? ' stroke-dasharray="' + o.dash + '"' : "") + "/>");
  if (o.label) this.add('<text x="' + (this.w - this.m.r - 3) + '" y="' + (y - 3) + '" text-anchor="end" class="small" fill="' + col + '">' + esc(o.label) + "</text>");
  return this;
};
Plot.prototype.vline = function (v, col, o) {
  o = o || {};
  if (!fin(v)) return this;
  var x = this.X(v).toFixed(1);
  this.add('<path d="M' + x + " " + this.m.t + "V" + (this.h - this.m.b) + '" stroke="' + col + '" stroke-width="' + (o.lw || 1) + '"' +
    (o.dash ? ' stroke-dasharray="' + o.dash + '"' : "") + "/>");
  if (o.label) this.add('<text x="' + (+x + 4) + '" y="' + (this.m.t + 13) + '" class="small" fill="' + col + '">' + esc(o.label) + "</text>");
  return this;
};
Plot.prototype.band = function (x0, x1, col) {
  if (!fin(x0) || !fin(x1)) return this;
  var a = this.X(x0), b = this.X(x1);
  return this.add('<rect x="' + Math.min(a, b).toFixed(1) + '" y="' + this.m.t + '" width="' + Math.abs(b - a).toFixed(1) +
    '" height="' + (this.h - this.m.t - this.m.b) + '" fill="' + col + '"/>');
};
Plot.prototype.rect = function (x0, x1, y0, y1, fill, extra, tip) {
  var a = this.X(x0), b = this.X(x1), c = this.Y(y0), d = this.Y(y1);
  return this.add('<rect x="' + Math.min(a, b).toFixed(2) + '" y="' + Math.min(c, d).toFixed(2) + '" width="' + Math.abs(b - a).toFixed(2) +
    '" height="' + Math.abs(d - c).toFixed(2) + '" fill="' + fill + '"' + (extra || "") +
    (tip ? "><title>" + esc(tip) + "</title></rect>" : "/>"));
};
Plot.prototype.image = function (url, ext, op) {
  var x0 = this.X(ext[0]), x1 = this.X(ext[1]), y0 = this.Y(ext[3]), y1 = this.Y(ext[2]);
  return this.add('<image href="' + url + '" x="' + x0.toFixed(1) + '" y="' + y0.toFixed(1) + '" width="' + (x1 - x0).toFixed(1) +
    '" height="' + (y1 - y0).toFixed(1) + '" preserveAspectRatio="none" style="image-rendering:pixelated"' + (op ? ' opacity="' + op + '"' : "") + "/>");
};
Plot.prototype.ellipse = function (cx, cy, a, b, ang, col, o) {
  o = o || {};
  if (!fin(cx) || !fin(cy) || !fin(a) || !fin(b)) return this;
  var t = (ang || 0) * Math.PI / 180, d = "";
  for (var k = 0; k <= 48; k++) {
    var p = 2 * Math.PI * k / 48, u = a * Math.cos(p), v = b * Math.sin(p);
    d += (k ? "L" : "M") + this.X(cx + u * Math.cos(t) - v * Math.sin(t)).toFixed(1) + " " + this.Y(cy + u * Math.sin(t) + v * Math.cos(t)).toFixed(1);
  }
  var attr = o.cell !== undefined ? ' data-cell="' + o.cell + '" class="pick"' : "";
  return this.add('<path d="' + d + 'Z" fill="' + (o.fill || "none") + '" stroke="' + col + '" stroke-width="' + (o.lw || 1.4) + '"' + attr + ">" +
    (o.tip ? "<title>" + esc(o.tip) + "</title>" : "") + "</path>");
};
Plot.prototype.text = function (x, y, t, o) {
  o = o || {};
  return this.add('<text x="' + this.X(x).toFixed(1) + '" y="' + this.Y(y).toFixed(1) + '" class="' + (o.cls || "small") + '"' +
    (o.anchor ? ' text-anchor="' + o.anchor + '"' : "") + (o.col ? ' fill="' + o.col + '"' : "") +
    (o.dx ? ' dx="' + o.dx + '"' : "") + (o.dy ? ' dy="' + o.dy + '"' : "") + ">" + esc(t) + "</text>");
};
Plot.prototype.note = function (t, col) {
  var cx = (this.m.l + this.w - this.m.r) / 2, cy = (this.m.t + this.h - this.m.b) / 2;
  var width = this.w - this.m.l - this.m.r, per = Math.max(12, Math.floor((width - 10) / 7.2));
  var lines = [], s = "";
  String(t).split("\n").forEach(function (ln) { wrap(ln, per).split("\n").forEach(function (x) { lines.push(x); }); });
  var wmax = 0;
  lines.forEach(function (ln) { wmax = Math.max(wmax, ln.length * 7.2); });
  s += '<rect x="' + (cx - wmax / 2 - 5) + '" y="' + (cy - lines.length * 7.5 - 6) + '" width="' + (wmax + 10) + '" height="' +
    (lines.length * 15 + 6) + '" fill="#fff" opacity="0.8" rx="2"/>';
  lines.forEach(function (ln, i) {
    s += '<text x="' + cx + '" y="' + (cy + (i - (lines.length - 1) / 2) * 15) + '" text-anchor="middle" class="note"' +
      (col ? ' fill="' + col + '"' : "") + ">" + esc(ln) + "</text>";
  });
  this.over.push(s);
  return this;
};
Plot.prototype.shade = function (op) {
  this.over.unshift('<rect x="' + this.m.l + '" y="' + this.m.t + '" width="' + (this.w - this.m.l - this.m.r) + '" height="' +
    (this.h - this.m.t - this.m.b) + '" fill="#f2f2f2" opacity="' + (op || 0.7) + '"/>');
  return this;
};
Plot.prototype.axes = function (o) {
  var self = this, s = "", L = this.m.l, R = this.w - this.m.r, T = this.m.t, B = this.h - this.m.b;
  var xt = o.xt || (this.xlog ? [] : niceTicks(Math.min(this.xr[0], this.xr[1]), Math.max(this.xr[0], this.xr[1]), o.nx || 4));
  var yt = o.yt || (this.ylog ? [] : niceTicks(Math.min(this.yr[0], this.yr[1]), Math.max(this.yr[0], this.yr[1]), o.ny || 4));
  var xmin = Math.min(this.xr[0], this.xr[1]), xmax = Math.max(this.xr[0], this.xr[1]);
  var ymin = Math.min(this.yr[0], this.yr[1]), ymax = Math.max(this.yr[0], this.yr[1]);
  xt.forEach(function (v) {
    if (v < xmin - 1e-9 || v > xmax + 1e-9) return;
    var x = self.X(v).toFixed(1);
    s += '<path d="M' + x + " " + B + "v5" + '" stroke="#333"/><text x="' + x + '" y="' + (B + 17) + '" text-anchor="middle" class="tick">' + fmt(v, 3) + "</text>";
  });
  yt.forEach(function (v) {
    if (v < ymin - 1e-9 || v > ymax + 1e-9) return;
    var y = self.Y(v).toFixed(1);
    s += '<path d="M' + L + " " + y + "h-5" + '" stroke="#333"/><text x="' + (L - 7) + '" y="' + (+y + 4) + '" text-anchor="end" class="tick">' + fmt(v, 3) + "</text>";
  });
  s += '<rect x="' + L + '" y="' + T + '" width="' + (R - L) + '" height="' + (B - T) + '" fill="none" stroke="#333"/>';
  if (o.xl) s += '<text x="' + ((L + R) / 2) + '" y="' + (this.h - 8) + '" text-anchor="middle" class="lab">' + esc(o.xl) + "</text>";
  if (o.yl) s += '<text transform="translate(' + 14 + "," + ((T + B) / 2) + ') rotate(-90)" text-anchor="middle" class="lab">' + esc(o.yl) + "</text>";
  if (o.title) s += '<text x="' + L + '" y="' + (T - 8) + '" class="ttl">' + esc(o.title) + "</text>";
  this.frame = s;
  return this;
};
Plot.prototype.cbar = function (lut, lo, hi, label, o) {
  /* vertical colour bar in the right margin */
  o = o || {};
  var x = this.w - this.m.r + 12, T = this.m.t, B = this.h - this.m.b, n = 48, s = "", hgt = (B - T) / n;
  for (var i = 0; i < n; i++) {
    s += '<rect x="' + x + '" y="' + (B - (i + 1) * hgt).toFixed(2) + '" width="12" height="' + (hgt + 0.6).toFixed(2) + '" fill="' + lutColour(lut, (i + 0.5) / n) + '"/>';
  }
  s += '<rect x="' + x + '" y="' + T + '" width="12" height="' + (B - T) + '" fill="none" stroke="#333"/>';
  var ticks = o.ticks || niceTicks(lo, hi, 4);
  ticks.forEach(function (v) {
    if (v < lo - 1e-9 * Math.abs(hi - lo) || v > hi + 1e-9 * Math.abs(hi - lo)) return;
    var y = B - (v - lo) / (hi - lo) * (B - T);
    s += '<path d="M' + (x + 12) + " " + y.toFixed(1) + 'h4" stroke="#333"/><text x="' + (x + 18) + '" y="' + (y + 4).toFixed(1) + '" class="tick">' + (o.names ? o.names[v] : fmt(v, 3)) + "</text>";
  });
  s += '<text transform="translate(' + (this.w - 6) + "," + ((T + B) / 2) + ') rotate(-90)" text-anchor="middle" class="lab">' + esc(label) + "</text>";
  this.parts.push(s);
  return this;
};
Plot.prototype.legend = function (items, where) {
  var s = "", x = where === "left" ? this.m.l + 8 : this.w - this.m.r - 8, y = this.m.t + 14;
  var anchor = where === "left" ? "start" : "end";
  var wmax = 0;
  items.forEach(function (it) { wmax = Math.max(wmax, it[0].length * 6.4 + 24); });
  s += '<rect x="' + (anchor === "start" ? x - 4 : x - wmax - 2) + '" y="' + (y - 12) + '" width="' + (wmax + 6) +
    '" height="' + (items.length * 15 + 4) + '" fill="#fff" opacity="0.85" rx="2"/>';
  items.forEach(function (it, i) {
    var yy = y + i * 15, mx = anchor === "start" ? x : x - 14;
    s += '<path d="M' + mx + " " + (yy - 4) + 'h12" stroke="' + it[1] + '" stroke-width="2.5"' + (it[2] ? ' stroke-dasharray="' + it[2] + '"' : "") + "/>";
    s += '<text x="' + (anchor === "start" ? x + 16 : x - 18) + '" y="' + yy + '" class="small" text-anchor="' + anchor + '">' + esc(it[0]) + "</text>";
  });
  this.over.push(s);
  return this;
};
Plot.prototype.svg = function (cls) {
  var clip = "c" + Math.random().toString(36).slice(2, 9);
  return '<svg class="plot ' + (cls || "") + '" width="' + this.w + '" height="' + this.h + '" viewBox="0 0 ' + this.w + " " + this.h + '">' +
    '<defs><clipPath id="' + clip + '"><rect x="' + this.m.l + '" y="' + this.m.t + '" width="' + (this.w - this.m.l - this.m.r) + '" height="' + (this.h - this.m.t - this.m.b) + '"/></clipPath></defs>' +
    '<g clip-path="url(#' + clip + ')">' + this.parts.join("") + "</g>" + (this.frame || "") + this.over.join("") + "</svg>";
};

/* ---------- images ---------- */
function mapURL(vals, ny, nx, off, lut, lo, hi) {
  var c = document.createElement("canvas"); c.width = nx; c.height = ny;
  var ctx = c.getContext("2d"), img = ctx.createImageData(nx, ny);
  for (var i = 0; i < ny * nx; i++) {
    var v = vals[off + i], col = lutColour(lut, (v - lo) / (hi - lo)), rgb = col ? hexRgb(col) : [214, 214, 214];
    img.data[4 * i] = rgb[0]; img.data[4 * i + 1] = rgb[1]; img.data[4 * i + 2] = rgb[2]; img.data[4 * i + 3] = 255;
  }
  ctx.putImageData(img, 0, 0);
  return c.toDataURL("image/png");
}

/* a plot with its colour bar outside the clipped area */
function finish(p, bar) {
  var s = p.svg();
  if (!bar) return s;
  var q = new Plot(p.w, p.h, {l: p.m.l, r: p.m.r, t: p.m.t, b: p.m.b});
  q.cbar.apply(q, bar);
  return s.replace("</svg>", q.parts.join("") + "</svg>");
}

/* ---------- the cell panel ---------- */
function mapPlot(ext, url, title, o) {
  o = o || {};
  var pw = 170, ph = Math.max(110, Math.min(250, pw * (ext[3] - ext[2]) / (ext[1] - ext[0])));
  var r = o.bar ? 88 : 14;
  var p = new Plot(58 + pw + r, 26 + ph + 44, {x: [ext[0], ext[1]], y: [ext[2], ext[3]], r: r, equal: true});
  p.add('<rect x="0" y="0" width="' + p.w + '" height="' + p.h + '" fill="#d6d6d6"/>');
  if (url) p.image(url, ext, o.op);
  return p;
}

function drawMaps(d, c) {
  var g = S.grid, ny = g.ny, nx = g.nx, ext = g.ext, m = d.map, out = [];
  var v = unpack(m.maps), lim = m.maps.m, lagms = S.lags_ms[m.li];
  var names = ["ON", "OFF", "linear (ON \u2212 OFF)"];
  for (var k = 0; k < 3; k++) {
    var url = mapURL(v, ny, nx, k * ny * nx, LUT.signed, -lim, lim);
    var p = mapPlot(ext, url, names[k], {bar: k === 2});
    var o = m.outline;
    if (o && fin(o[2])) { p.ellipse(o[0], o[1], o[2], o[3], o[4], "#111"); }
    if (o) p.add('<path d="M' + (p.X(o[0]) - 5) + " " + p.Y(o[1]) + "h10M" + p.X(o[0]) + " " + (p.Y(o[1]) - 5) + 'v10" stroke="#111" stroke-width="1.5"/>');
    if (k === 2) p.add('<circle cx="' + p.X(m.px[0]) + '" cy="' + p.Y(m.px[1]) + '" r="4" fill="none" stroke="#fff" stroke-width="1.5"/>');
    p.axes({xl: "azimuth (deg)", yl: "elevation (deg)", title: names[k] + ", " + fmt(lagms, 3) + " ms" + (m.sig ? "" : ", n.s."), nx: 3, ny: 3});
    out.push(finish(p, k === 2 ? [LUT.signed, -lim, lim, "map (" + UNIT + ")"] : null));
  }
  /* time course at the strongest pixel */
  var lags = S.lags_ms, all = m.tc[0].concat(m.tc[1], m.tc[2]);
  var q = new Plot(280, 230, {x: range(lags, 0.05), y: range(all, 0.1, [0])});
  q.hline(0, "#777", {lw: 1});
  q.vline(lags[m.li], "#999", {dash: "3 3"});
  var cols = [["ON", "#d9822b"], ["OFF", "#5b4a9b"], ["linear", "#222", "5 3"]];
  for (var j = 0; j < 3; j++) { q.line(lags, m.tc[j], cols[j][1], {dash: cols[j][2]}); q.pts(lags, m.tc[j], cols[j][1], {r: 2.4}); }
  q.legend(cols, m.li < lags.length / 2 ? "right" : "left");
  if (m.last) q.note("peak at the last lag:\nthe lag window may be too short", "#b03a2e");
  q.axes({xl: "lag (ms)", yl: "map (" + UNIT + ")", title: "time course at (" + fmt(m.px[0], 3) + ", " + fmt(m.px[1], 3) + ") deg"});
  out.push(q.svg());
  if (m.st) out.push(drawSlice(m.st));
  return out;
}

/* the space-time slice: the map summed along the cell's stripes, position across them by lag
   (rows packed from the last lag down, so the image's top row is the longest lag) */
function drawSlice(st) {
  var v = unpack(st.s), L = st.s.sh[0], B = st.s.sh[1], lim = st.s.m, pos = st.pos, lags = S.lags_ms;
  var dp = B > 1 ? pos[1] - pos[0] : 1, dl = lags.length > 1 ? lags[1] - lags[0] : 1;
  var ext = [pos[0] - dp / 2, pos[B - 1] + dp / 2, lags[0] - dl / 2, lags[L - 1] + dl / 2];
  var p = new Plot(58 + 200 + 88, 26 + 170 + 44, {x: [ext[0], ext[1]], y: [ext[2], ext[3]], r: 88});
  p.image(mapURL(v, L, B, 0, LUT.signed, -lim, lim), ext);
  p.axes({xl: "across the stripes (deg; axis " + fmt(st.ax, 3) + " deg)", yl: "lag (ms)",
          title: "x-t slice, separability " + fmt(st.sep, 2) + (fin(st.dir) ? ", to " + fmt(st.dir, 3) + "\u00b0" : "")});
  return finish(p, [LUT.signed, -lim, lim, "summed map (" + UNIT + ")"]);
}

function surfPlot(vals, off, lo, hi, lut, title, o) {
  o = o || {};
  var ori = S.ori, sfs = S.sfs, no = ori.length, ns = sfs.length;
  var step = no > 1 ? ori[1] - ori[0] : 180;
  var le = [], re = [];
  for (var i = 0; i < ns; i++) {
    var a = i > 0 ? Math.sqrt(sfs[i - 1] * sfs[i]) : sfs[0] / (ns > 1 ? Math.sqrt(sfs[1] / sfs[0]) : 1.4);
    var b = i < ns - 1 ? Math.sqrt(sfs[i] * sfs[i + 1]) : sfs[ns - 1] * (ns > 1 ? Math.sqrt(sfs[ns - 1] / sfs[ns - 2]) : 1.4);
    le.push(a); re.push(b);
  }
  var p = new Plot(o.bar ? 292 : 218, 240, {x: [ori[0] - step / 2, ori[no - 1] + step / 2], y: [le[0], re[ns - 1]], ylog: true, r: o.bar ? 88 : 14});
  for (var oi = 0; oi < no; oi++) {
    for (var si = 0; si < ns; si++) {
      var v = vals[off + oi * ns + si], col = lutColour(lut, (v - lo) / (hi - lo)) || "#d6d6d6";
      p.rect(ori[oi] - step / 2, ori[oi] + step / 2, le[si], re[si], col, "", fmt(ori[oi], 3) + " deg, " + fmt(sfs[si], 3) + " cycles/deg: " + fmt(v, 3));
    }
  }
  if (o.grey) p.shade(0.72);
  if (o.note) p.note(o.note, "#333");
  p.axes({xl: "orientation (deg)", yl: "SF (cycles/deg)", title: title, xt: ORI_TICKS, yt: sfs.length > 5 ? [sfs[0], sfs[Math.floor(ns / 2)], sfs[ns - 1]] : sfs});
  return p;
}

function drawSurfaces(d, c) {
  var s = d.surf, out = [];
  if (!s) return out;
  var h = unpack(s.h), no = S.ori.length, ns = S.sfs.length, hi = s.h.m;
  var lin = S.col.linear[ROW_OF[c]];
  var p1 = surfPlot(h, 0, 0, hi, LUT.magnitude, "measured |H|", {bar: !S.lags_ms});
  out.push(finish(p1, S.lags_ms ? null : [LUT.magnitude, 0, hi, "|H| (" + UNIT + " / contrast)"]));
  var why = s.has_pred ? (lin === true ? "" : "not drawn as a prediction: " + (lin === false ? "cell not linear" : "no linearity call") +
      (S.col.linear_reason[ROW_OF[c]] ? "\n(" + S.col.linear_reason[ROW_OF[c]] + ")" : "")) : (s.pred_reason || "no prediction");
  if (S.lags_ms) {
    var p2 = surfPlot(h, no * ns, 0, hi, LUT.magnitude, s.has_pred ? "predicted (map \u00d7 " + (s.gain_negative ? "\u2212" : "") + fmt(s.gain, 3) + ")" : "predicted from map",
      {bar: true, grey: !!why, note: why});
    out.push(finish(p2, [LUT.magnitude, 0, hi, "|H| (" + UNIT + " / contrast)"]));
  }
  var pm = unpack(s.pm), lim = s.pm.m;
  var cls = S.col.grating_class[ROW_OF[c]];
  var p3 = surfPlot(pm, 0, -lim, lim, LUT.signed, "mean over phase" + (cls === "complex" ? " (complex cell)" : ""), {bar: true});
  out.push(finish(p3, [LUT.signed, -lim, lim, "response (" + UNIT + ")"]));
  if (s.inv) {
    var g = S.grid, ny = g.ny, nx = g.nx;
    var a = unpack(s.inv.g), ma = s.inv.g.m;
    var pa = mapPlot(g.ext, mapURL(a, ny, nx, 0, LUT.signed, -ma, ma), "", {bar: !s.inv.m});
    if (lin !== true) { pa.shade(0.72); pa.note("a linear prediction: " + (lin === false ? "cell not linear" : "no linearity call"), "#333"); }
    pa.axes({xl: "azimuth (deg)", yl: "elevation (deg)", title: "map from gratings", nx: 3, ny: 3});
    out.push(finish(pa, s.inv.m ? null : [LUT.signed, -1, 1, "fraction of peak (1)"]));
    if (s.inv.m) {
      var b = unpack(s.inv.m), mb = s.inv.m.m;
      var pb = mapPlot(g.ext, mapURL(b, ny, nx, 0, LUT.signed, -mb, mb), "", {bar: true});
      pb.axes({xl: "azimuth (deg)", yl: "elevation (deg)", title: "map, same band" + (fin(s.inv.sim) ? " (r = " + fmt(s.inv.sim, 2) + ")" : ""), nx: 3, ny: 3});
      out.push(finish(pb, [LUT.signed, -1, 1, "fraction of peak (1)"]));
    } else {
      var pc = mapPlot(g.ext, null, "", {bar: false});
      pc.note("no significant map");
      pc.axes({xl: "azimuth (deg)", yl: "elevation (deg)", title: "measured map, same SF band", nx: 3, ny: 3});
      out.push(pc.svg());
    }
  }
  return out;
}

function wrap(t, n) {
  var words = String(t).split(" "), lines = [], cur = "";
  words.forEach(function (w) {
    if ((cur + " " + w).trim().length > n && cur) { lines.push(cur); cur = w; } else cur = (cur + " " + w).trim();
  });
  if (cur) lines.push(cur);
  return lines.join("\n");
}

function vonMises(th, p) {
  var d = (th - p[3]) * Math.PI / 180;
  return p[0] + p[1] * Math.exp(p[2] * (Math.cos(2 * d) - 1));
}

function drawTuning(d, c) {
  var out = [], t = d.tun, r = ROW_OF[c];
  if (S.ori || S.tested_sfs.length) {
    if (!t) {
      var e1 = new Plot(280, 230, {x: [0, 180]}); e1.note("no grating curve"); e1.axes({xl: "orientation (deg)", yl: "response (" + UNIT + ")", title: "orientation tuning", xt: ORI_TICKS});
      out.push(e1.svg());
    } else {
      var lo = t.oc.map(function (v, i) { return fin(v) && t.ose && fin(t.ose[i]) ? v - t.ose[i] : v; });
      var hi = t.oc.map(function (v, i) { return fin(v) && t.ose && fin(t.ose[i]) ? v + t.ose[i] : v; });
      var p = new Plot(280, 230, {x: [-8, 188], y: range(lo.concat(hi), 0.1, [0])});
      p.hline(0, "#777", {label: t.src === "drifting" ? "spontaneous" : "blank"});
      var th = t.th.concat([t.th[0] + 180]), oc = t.oc.concat([t.oc[0]]);
      if (t.ose) p.err(th, oc, t.ose.concat([t.ose[0]]), "#1f7a8c");
      p.pts(th, oc, "#1f7a8c", {r: 3.4});
      var title = "orientation" + (t.sig ? "" : " (n.s.)");
      if (t.vm) {
        var xs = [], ys = [];
        for (var k = 0; k <= 90; k++) { xs.push(2 * k); ys.push(vonMises(2 * k, t.vm)); }
        p.line(xs, ys, "#222", {lw: 1.5});
        p.vline(t.vm[3], "#999", {dash: "3 3"});
        title = "orientation, pref " + fmt(t.vm[3], 3) + " deg";
      }
      p.axes({xl: "orientation (deg)", yl: "response (" + UNIT + ")", title: title, xt: ORI_TICKS});
      out.push(p.svg());
      var sf = t.sf, sc = t.sc;
      var pos = sf.filter(function (v) { return fin(v) && v > 0; });
      var slo = sc.map(function (v, i) { return fin(v) && t.sse && fin(t.sse[i]) ? v - t.sse[i] : v; });
      var shi = sc.map(function (v, i) { return fin(v) && t.sse && fin(t.sse[i]) ? v + t.sse[i] : v; });
      var xr = [Math.min.apply(null, pos) / 1.6, Math.max.apply(null, pos) * 1.6];
      var q = new Plot(280, 230, {x: xr, xlog: true, y: range(slo.concat(shi), 0.1, [0])});
      if (t.sig && fin(t.psf)) {
        if (fin(t.psf_ci[0]) && fin(t.psf_ci[1])) q.band(Math.max(t.psf_ci[0], xr[0]), Math.min(t.psf_ci[1], xr[1]), "#e7eef0");
        q.vline(t.psf, "#555", {dash: "4 3"});
      }
      q.hline(0, "#777", {label: t.src === "drifting" ? "spontaneous" : "blank"});
      q.line(sf, sc, "#d9822b", {lw: 1.2, op: 0.7});
      if (t.sse) q.err(sf, sc, t.sse, "#d9822b");
      q.pts(sf, sc, "#d9822b", {r: 3.4});
      q.axes({xl: "spatial frequency (cycles/deg)", yl: "response (" + UNIT + ")", xt: pos,
              title: "SF" + (t.sig && fin(t.psf) ? ", pref " + fmt(t.psf, 2) + " c/deg" : "") + (t.sig ? "" : " (n.s.)")});
      out.push(q.svg());
    }
  }
  if (d.size && S.radii) {
    var rr = S.radii, lin = S.col.linear[r];
    var z = new Plot(280, 230, {x: range(rr, 0.05, [0]), y: range(d.size.disk.concat(d.size.ann), 0.1, [0])});
    z.hline(0, "#777");
    z.line(rr, d.size.disk, "#1f7a8c"); z.pts(rr, d.size.disk, "#1f7a8c", {r: 2.6});
    z.line(rr, d.size.ann, "#c0392b", {dash: "5 3"}); z.pts(rr, d.size.ann, "#c0392b", {r: 2.6});
    z.legend([["disk (radius)", "#1f7a8c"], ["annulus (hole radius)", "#c0392b", "5 3"]]);
    var noVals = !d.size.disk.some(fin);
    if (noVals) z.note("no fitted centre");
    else if (lin !== true) { z.shade(0.75); z.note("prediction holds for linear cells only; " + (lin === false ? "this cell is not linear" : "no linearity call"), "#333"); }
    z.axes({xl: "radius (deg)", yl: "response (" + UNIT + " \u00d7 deg\u00b2)", title: "size tuning (from the map)"});
    out.push(z.svg());
  }
  if (d.surf && d.surf.lag) {
    var L = d.surf.lag, gl = S.glags_ms;
    var w = new Plot(280, 230, {x: range(gl, 0.05), y: range(L.e, 0.1, [0])});
    w.line(gl, L.e, "#5b4a9b"); w.pts(gl, L.e, "#5b4a9b", {r: 2.6});
    if (L.peak >= 0) w.vline(gl[L.peak], "#999", {dash: "3 3"});
    if (L.last) w.note("peak at the last lag:\nthe lag window may be too short", "#b03a2e");
    w.axes({xl: "lag (ms)", yl: "s.d. across gratings (" + UNIT + ")", title: "flashed response over lag"});
    out.push(w.svg());
  }
  return out;
}

function factsTable(c) {
  var tr = document.getElementById("cell-" + c);
  var src = document.getElementById("facts-" + c);
  return src ? src.innerHTML : "";
}

var current = null;
function openCell(c, how) {
  if (!(c in CELLS)) return;
  var d = CELLS[c], box = document.getElementById("viewer");
  var figs = [];
  try {
    if (d.map) figs.push(["maps at the peak lag (ON: after a bright spot, OFF: after a dark spot), their time course" + (d.map.st ? " and the x-t slice" : ""), drawMaps(d, c)]);
    var f1f0 = S.col.f1_f0[ROW_OF[c]];
    if (d.surf) figs.push(["flashed gratings: orientation \u00d7 spatial frequency" + (fin(f1f0) && f1f0 < S.thr.f1_f0 ?
      " \u2014 F1/F0 " + fmt(f1f0, 2) + " < " + S.thr.f1_f0 + ": little phase dependence, the mean over phase carries the tuning" : ""), drawSurfaces(d, c)]);
    if (d.tun !== undefined || d.size || (d.surf && d.surf.lag)) figs.push([[d.tun !== undefined ? "tuning (" + (d.tun ? d.tun.src + " gratings" : "no grating curve") + ")" : "",
      d.size ? "size tuning predicted from the map" : "", d.surf && d.surf.lag ? "flashed response over lag" : ""].filter(Boolean).join("; "), drawTuning(d, c)]);
  } catch (e) {
    figs.push(["error", ['<p class="absent">could not draw this cell: ' + esc(e.message) + "</p>"]]);
    if (window.console) console.warn("map2d: cell " + c + ": " + e.message);
  }
  var html = '<div class="vhead"><button id="prev" title="previous cell (p or left arrow)">\u25c0 previous</button>' +
    '<h3 id="viewer-title">Cell ' + esc(c) + "</h3>" +
    '<button id="next" title="next cell (n or right arrow)">next \u25b6</button><span class="hint">keys: p / n or \u2190 / \u2192</span></div>' +
    '<div class="vbody"><div class="facts-box">' + factsTable(c) + '</div><div class="figs">';
  figs.forEach(function (f) { html += '<div class="figrow"><div class="rowtitle">' + esc(f[0]) + "</div>" + f[1].join("") + "</div>"; });
  html += "</div></div>";
  box.innerHTML = html;
  box.setAttribute("data-cell", c);
  document.getElementById("prev").onclick = function () { step(-1); };
  document.getElementById("next").onclick = function () { step(1); };
  if (current !== null) { var old = document.getElementById("cell-" + current); if (old) old.classList.remove("sel"); }
  current = c;
  var row = document.getElementById("cell-" + c);
  if (row) {
    row.classList.add("sel");
    var sc = document.getElementById("index-scroll");
    if (sc && (row.offsetTop < sc.scrollTop + 30 || row.offsetTop > sc.scrollTop + sc.clientHeight - 30)) sc.scrollTop = row.offsetTop - sc.clientHeight / 2;
  }
  markPicked(c);
  if (how !== "init" && history.replaceState) history.replaceState(null, "", "#cell-" + c);
  if (how === "jump") box.scrollIntoView({block: "start"});
}

function markPicked(c) {
  document.querySelectorAll(".pick.picked").forEach(function (e) { e.classList.remove("picked"); });
  document.querySelectorAll('.pick[data-cell="' + c + '"]').forEach(function (e) { e.classList.add("picked"); });
}

/* ---------- the index: sort, filter, prev/next ---------- */
var table = document.getElementById("index");
var body = table.tBodies[0];
var rows = Array.prototype.slice.call(body.rows);
function visibleRows() { return rows.filter(function (r) { return r.style.display !== "none"; }); }
function step(k) {
  var vis = visibleRows();
  if (!vis.length) return;
  var i = vis.findIndex(function (r) { return r.id === "cell-" + current; });
  var j = i < 0 ? 0 : Math.max(0, Math.min(vis.length - 1, i + k));
  openCell(vis[j].id.slice(5), "key");
}
var sortState = {col: 0, dir: 1};
function cellVal(r, j) {
  var v = r.cells[j].getAttribute("data-v");
  return v === null || v === "" ? null : v;
}
Array.prototype.forEach.call(table.tHead.rows[0].cells, function (th, j) {
  th.addEventListener("click", function () {
    var dir = sortState.col === j ? -sortState.dir : 1, num = th.getAttribute("data-kind") !== "text";
    sortState = {col: j, dir: dir};
    rows.sort(function (a, b) {
      var x = cellVal(a, j), y = cellVal(b, j);
      if (x === null && y === null) return 0;
      if (x === null) return 1;
      if (y === null) return -1;
      if (num) { x = +x; y = +y; }
      return (x < y ? -1 : x > y ? 1 : 0) * dir;
    });
    rows.forEach(function (r) { body.appendChild(r); });
    Array.prototype.forEach.call(table.tHead.rows[0].cells, function (h) { h.removeAttribute("data-sort"); });
    th.setAttribute("data-sort", dir > 0 ? "up" : "down");
  });
});
var heads = Array.prototype.map.call(table.tHead.rows[0].cells, function (th) { return th.getAttribute("data-col"); });
function parseFilter(text) {
  var conds = [], words = [];
  text.trim().split(/\s+/).forEach(function (tok) {
    if (!tok) return;
    var m = tok.match(/^([A-Za-z_0-9\/]+)(<=|>=|!=|=|<|>)(.*)$/);
    if (m) {
      var j = heads.indexOf(m[1]);
      if (j < 0) j = Array.prototype.findIndex.call(table.tHead.rows[0].cells, function (th) { return th.textContent.replace(/[\u25b2\u25bc]/g, "").trim().toLowerCase() === m[1].toLowerCase(); });
      if (j >= 0) { conds.push([j, m[2], m[3]]); return; }
    }
    words.push(tok.toLowerCase());
  });
  return {conds: conds, words: words};
}
function test(v, op, ref) {
  if (v === null) return op === "=" && (ref === "" || ref === "none");
  var a = +v, b = +ref, num = isFinite(a) && isFinite(b) && ref !== "";
  if (!num) { a = String(v).toLowerCase(); b = String(ref).toLowerCase(); }
  switch (op) {
    case "=": return a === b || (!num && (b === "yes" && a === "true" || b === "no" && a === "false"));
    case "!=": return !(a === b);
    case "<": return a < b; case ">": return a > b; case "<=": return a <= b; case ">=": return a >= b;
  }
  return true;
}
function applyFilter() {
  var f = parseFilter(document.getElementById("filter").value), n = 0;
  var need = {};
  document.querySelectorAll("select.quick").forEach(function (s) { if (s.value) need[s.getAttribute("data-col")] = s.value; });
  rows.forEach(function (r) {
    var ok = f.conds.every(function (c) { return test(cellVal(r, c[0]), c[1], c[2]); });
    if (ok && f.words.length) {
      var txt = r.textContent.toLowerCase();
      ok = f.words.every(function (w) { return txt.indexOf(w) >= 0; });
    }
    for (var col in need) {
      var j = heads.indexOf(col), v = cellVal(r, j);
      var want = need[col] === "none" ? null : need[col];
      if (ok && v !== want) ok = false;
    }
    r.style.display = ok ? "" : "none";
    n += ok;
  });
  document.getElementById("shown").textContent = n + " of " + rows.length + " cells shown";
}
document.getElementById("filter").addEventListener("input", applyFilter);
document.querySelectorAll("select.quick").forEach(function (s) { s.addEventListener("change", applyFilter); });
body.addEventListener("click", function (e) {
  var tr = e.target.closest("tr");
  if (tr && tr.id) { e.preventDefault(); openCell(tr.id.slice(5), "click"); }
});
document.addEventListener("keydown", function (e) {
  if (e.target && (e.target.tagName === "INPUT" || e.target.tagName === "SELECT")) return;
  if (e.key === "n" || e.key === "ArrowRight") { step(1); e.preventDefault(); }
  else if (e.key === "p" || e.key === "ArrowLeft") { step(-1); e.preventDefault(); }
});
document.addEventListener("click", function (e) {
  var t = e.target.closest ? e.target.closest(".pick") : null;
  if (t && t.getAttribute("data-cell") !== null) openCell(t.getAttribute("data-cell"), "jump");
});
window.addEventListener("hashchange", function () {
  var m = location.hash.match(/^#cell-(-?\d+)$/);
  if (m) openCell(m[1], "jump");
});

/* ---------- population ---------- */
function callOf(r) { var v = S.col.linear[r]; return v === true ? "yes" : v === false ? "no" : "none"; }
function callName(k) { return k === "yes" ? "linear" : k === "no" ? "not linear" : "no linearity call"; }

function mosaic() {
  if (!S.grid) return "";
  var ext = S.grid.ext, pad = 0.06 * Math.max(ext[1] - ext[0], ext[3] - ext[2]);
  var p = new Plot(640, 500, {x: [ext[0] - pad, ext[1] + pad], y: [ext[2] - pad, ext[3] + pad], equal: true});
  p.rect(ext[0], ext[1], ext[2], ext[3], "none", ' stroke="#555" stroke-dasharray="5 4"');
  var n = 0, counts = {yes: 0, no: 0, none: 0}, noOutline = 0;
  var few = S.outlines.filter(function (o) { return o; }).length <= 60;
  var order = S.ids.map(function (id, r) { return r; });
  order.forEach(function (r) {
    var o = S.outlines[r];
    if (!o) return;
    var k = callOf(r), col = CALL_COL[k], id = S.ids[r];
    n++; counts[k]++;
    var tip = "cell " + id + ": " + callName(k) + " \u2014 click to open";
    if (fin(o[2])) p.ellipse(o[0], o[1], o[2], o[3], o[4], col, {cell: id, tip: tip, lw: 1.6, fill: "rgba(255,255,255,0.01)"});
    else noOutline++;
    p.pts([o[0]], [o[1]], col, {r: 3, cells: [id], tips: [tip]});
    if (few) p.text(o[0], o[1], String(id), {dx: 5, dy: -4, col: "#222"});
  });
  var missing = S.ids.length - n;
  p.legend(["yes", "no", "none"].map(function (k) { return [callName(k) + " (" + counts[k] + ")", CALL_COL[k]]; }), "left");
  if (!n) p.note("no fitted receptive field");
  p.axes({xl: "azimuth (deg)", yl: "elevation (deg)", title: "receptive fields: centre and 1-s.d. outline, by linearity call", nx: 8, ny: 6});
  var cap = n + " of " + S.ids.length + " cells have a fitted centre" + (missing ? "; " + missing + " have none (no significant map or no fit) and are not drawn" : "") +
    (noOutline ? "; " + noOutline + " without an outline (centre only)" : "") + ". Dashed: the sparse-noise grid. " +
    (few ? "Numbers: cell ids. " : "Hover a field for its cell id. ") + "Click a field to open the cell.";
  return '<figure class="pop">' + p.svg() + "<figcaption>" + esc(cap) + "</figcaption></figure>";
}

function hist(vals, lo, hi, nb, o) {
  var counts = new Array(nb).fill(0), n = 0, over = 0;
  vals.forEach(function (v) {
    if (!fin(v)) return;
    n++;
    if (v > hi) over++;
    var b = Math.floor((Math.min(Math.max(v, lo), hi) - lo) / (hi - lo) * nb);
    counts[Math.min(nb - 1, Math.max(0, b))]++;
  });
  var p = new Plot(360, 260, {x: [lo, hi], y: [0, Math.max(1, Math.max.apply(null, counts)) * 1.15]});
  var w = (hi - lo) / nb;
  counts.forEach(function (c, i) { if (c) p.rect(lo + i * w, lo + (i + 1) * w, 0, c, o.col, ' stroke="#fff" stroke-width="0.8"'); });
  if (fin(o.thr)) p.vline(o.thr, "#222", {dash: "5 3", lw: 1.4, label: o.thrLabel});
  if (!n) p.note(o.empty);
  p.axes({xl: o.xl, yl: "cells (count)", title: o.title + ": " + n + " of " + S.ids.length + " cells", ny: 4});
  return {svg: p.svg(), n: n, over: over};
}

function population() {
  var C = S.col, N = S.ids.length, out = [mosaic()];
  /* preferred orientation vs SF */
  var ori = C.pref_orientation_deg, sf = C.pref_sf_cpd, xs = [], ys = [], cols = [], cells = [], tips = [], miss = 0;
  for (var r = 0; r < N; r++) {
    if (fin(ori[r]) && fin(sf[r]) && sf[r] > 0) {
      xs.push(ori[r]); ys.push(sf[r]); cols.push(CALL_COL[callOf(r)]); cells.push(S.ids[r]);
      tips.push("cell " + S.ids[r] + ": " + fmt(ori[r], 3) + " deg, " + fmt(sf[r], 3) + " cycles/deg");
    } else if (C.grating_responsive[r] === true) miss++;
  }
  var tested = S.tested_sfs.filter(function (v) { return v > 0; });
  var yr = tested.length ? [Math.min.apply(null, tested.concat(ys)) / 1.4, Math.max.apply(null, tested.concat(ys)) * 1.4] : [0.01, 1];
  var p = new Plot(380, 300, {x: [-6, 186], y: yr, ylog: true});
  p.pts(xs, ys, null, {cols: cols, cells: cells, tips: tips, r: 3.6});
  if (!xs.length) p.note("no preferred orientation and SF");
  var counts = {yes: 0, no: 0, none: 0};
  cells.forEach(function (id) { counts[callOf(ROW_OF[id])]++; });
  p.legend(["yes", "no", "none"].map(function (k) { return [callName(k) + " (" + counts[k] + ")", CALL_COL[k]]; }), "left");
  p.axes({xl: "preferred orientation (deg)", yl: "preferred SF (cycles/deg)", xt: ORI_TICKS, yt: tested.length > 5 ? tested.filter(function (v, i) { return i % 2 === 0; }) : tested,
          title: "preference of " + xs.length + " of " + N + " cells"});
  var nresp = C.grating_responsive.filter(function (v) { return v === true; }).length;
  var cap1 = xs.length + " cells with a preferred orientation and SF; " + miss + " of the " + nresp +
    " cells responsive to gratings have no preferred orientation or SF (untuned or not fitted); the other " + (N - xs.length - miss) + " cells do not respond to gratings. Click a point to open the cell.";
  out.push('<figure class="pop">' + p.svg() + "<figcaption>" + esc(cap1) + "</figcaption></figure>");
  var T = S.thr;
  var h1 = hist(C.agreement, 0, 1, 20, {col: "#1f7a8c", thr: T.agreement, thrLabel: "linear \u2265 " + T.agreement, xl: "map-grating agreement (fraction of variance)", title: "agreement", empty: "no agreement values\n(needs sparse noise and flashed gratings)"});
  out.push('<figure class="pop">' + h1.svg + "<figcaption>" + esc("Dashed: the agreement a linear cell needs (" + T.agreement + "). " + (N - h1.n) + " cells have no agreement (no significant map or no grating response).") + "</figcaption></figure>");
  var f = C.f1_f0.filter(fin), top = Math.max(2, Math.ceil(Math.max.apply(null, f.concat([0])) * 4) / 4);
  top = Math.min(top, 4);
  var h2 = hist(C.f1_f0, 0, top, Math.round(top / 0.1), {col: "#d9822b", thr: T.f1_f0, thrLabel: "simple >", xl: "F1/F0 (ratio)", title: "modulation ratio", empty: "no F1/F0 values\n(needs drifting gratings)"});
  out.push('<figure class="pop">' + h2.svg + "<figcaption>" + esc("Dashed at " + T.f1_f0 + ": complex (below) and simple cells (above; Skottun et al. 1991). " + (N - h2.n) + " cells have no F1/F0" + (h2.over ? "; " + h2.over + " above " + top + " are counted in the last bin." : ".")) + "</figcaption></figure>");
  if (S.grid) {
    var h3 = hist(C.onoff_overlap, 0, 1, 20, {col: "#5b4a9b", thr: T.overlap, thrLabel: "overlapping >", xl: "ON/OFF overlap (fraction)", title: "ON/OFF overlap", empty: "no overlap values"});
    out.push('<figure class="pop">' + h3.svg + "<figcaption>" + esc("Dashed at " + T.overlap + ": above it ON and OFF subfields overlap (counts against a linear call). " + (N - h3.n) + " cells have no overlap value (no significant map).") + "</figcaption></figure>");
  }
  document.getElementById("population").innerHTML = out.join("");
}

/* ---------- field of view ---------- */
var FOV_PROPS = [
  ["pref_orientation_deg", "preferred orientation", "deg", "cyclic"],
  ["center_x_deg", "receptive-field azimuth", "deg", "seq"],
  ["center_y_deg", "receptive-field elevation", "deg", "seq"],
  ["pref_sf_cpd", "preferred SF", "cycles/deg", "seq"],
  ["agreement", "map-grating agreement", "fraction", "seq"],
  ["responsive", "responsive to sparse noise", "", "bool"],
  ["linear", "linearity call", "", "call"]
];
function fovValues(key) { return S.col[key] || S.ids.map(function () { return null; }); }
function drawFov(key) {
  var F = S.fov, box = document.getElementById("fov");
  if (!F) return;
  var prop = FOV_PROPS.filter(function (p) { return p[0] === key; })[0];
  var vals = fovValues(key), N = S.ids.length;
  var w = F.w, h = F.h, scale = Math.max(1, Math.min(4, Math.floor(720 / w)));
  var bin = atob(F.lab), lab = new Uint16Array(w * h);
  for (var i = 0; i < w * h; i++) lab[i] = bin.charCodeAt(2 * i) | (bin.charCodeAt(2 * i + 1) << 8);
  F._lab = lab;
  var lo = 0, hi = 1, lut = LUT.magnitude;
  if (prop[3] === "cyclic") { lo = 0; hi = 180; lut = LUT.cyclic; }
  else if (prop[3] === "seq") {
    var fv = vals.filter(fin); if (fv.length) { lo = Math.min.apply(null, fv); hi = Math.max.apply(null, fv); }
    if (key === "agreement") { lo = 0; hi = 1; }
    if (hi <= lo) { lo -= 0.5; hi += 0.5; }
  }
  function colourOf(r) {
    var v = vals[r];
    if (prop[3] === "bool") return v === true ? "#d9822b" : v === false ? "#7d8b99" : null;
    if (prop[3] === "call") return v === true ? CALL_COL.yes : v === false ? CALL_COL.no : null;
    return fin(v) ? lutColour(lut, (v - lo) / (hi - lo)) : null;
  }
  var rgbOf = [null];
  for (var r = 0; r < N; r++) { var c = colourOf(r); rgbOf.push(c ? hexRgb(c) : null); }
  var cv = document.createElement("canvas"); cv.width = w; cv.height = h;
  var ctx = cv.getContext("2d"), img = ctx.createImageData(w, h), bg = [38, 40, 44], empty = [120, 122, 128];
  for (i = 0; i < w * h; i++) {
    var L = lab[i], rgb = L === 0 ? bg : (rgbOf[L] || empty);
    img.data[4 * i] = rgb[0]; img.data[4 * i + 1] = rgb[1]; img.data[4 * i + 2] = rgb[2]; img.data[4 * i + 3] = 255;
  }
  ctx.putImageData(img, 0, 0);
  var dpr = Math.max(1, Math.min(3, window.devicePixelRatio || 1));     /* sharp on high-density screens */
  var big = document.createElement("canvas"); big.width = Math.round(w * scale * dpr); big.height = Math.round(h * scale * dpr);
  big.style.width = (w * scale) + "px"; big.style.height = (h * scale) + "px";
  big.id = "fov-canvas";
  var g = big.getContext("2d");
  g.setTransform(dpr, 0, 0, dpr, 0, 0);
  g.imageSmoothingEnabled = false;
  g.drawImage(cv, 0, 0, w * scale, h * scale);
  g.font = "11px system-ui, sans-serif"; g.textAlign = "center"; g.textBaseline = "middle";
  for (r = 0; r < N; r++) {
    if (!fin(F.cx[r])) continue;
    var x = (F.cx[r] + 0.5) * scale, y = (F.cy[r] + 0.5) * scale;
    g.lineWidth = 3; g.strokeStyle = "rgba(0,0,0,0.85)"; g.strokeText(String(S.ids[r]), x, y);
    g.fillStyle = "#ffffff"; g.fillText(String(S.ids[r]), x, y);
  }
  var bar;
  if (prop[3] === "bool" || prop[3] === "call") {
    var items = prop[3] === "bool" ? [["yes", "#d9822b"], ["no", "#7d8b99"], ["no value", "#787a80"]] :
      [["linear", CALL_COL.yes], ["not linear", CALL_COL.no], ["no call", "#787a80"]];
    bar = '<div class="keys">' + items.map(function (it) { return '<span><i style="background:' + it[1] + '"></i>' + esc(it[0]) + "</span>"; }).join("") + "</div>";
  } else {
    var q = new Plot(110, Math.max(220, Math.min(h * scale, 420)), {l: 2, r: 96, t: 12, b: 12});
    q.cbar(lut, lo, hi, prop[1] + " (" + prop[2] + ")", {ticks: prop[3] === "cyclic" ? ORI_TICKS : null});
    bar = '<svg width="110" height="' + q.h + '">' + q.parts.join("") + "</svg>" + '<div class="keys"><span><i style="background:#787a80"></i>no value</span></div>';
  }
  var holder = document.getElementById("fov-map");
  holder.innerHTML = "";
  holder.appendChild(big);
  document.getElementById("fov-bar").innerHTML = bar;
  document.querySelectorAll("#fov-props button").forEach(function (b) { b.classList.toggle("on", b.getAttribute("data-key") === key); });
  big.onclick = function (e) {
    var rc = big.getBoundingClientRect(), px = Math.floor((e.clientX - rc.left) / rc.width * w), py = Math.floor((e.clientY - rc.top) / rc.height * h);
    var L = lab[py * w + px];
    if (L > 0) openCell(S.ids[L - 1], "jump");
  };
}

function retinotopyPlots() {
  var F = S.fov, R = F && F.ret;
  if (!R) return "";
  var out = [], flag = {};
  R.flag.forEach(function (r) { flag[r] = 1; });
  [["az", "center_x_deg", "azimuth"], ["el", "center_y_deg", "elevation"]].forEach(function (a) {
    var fit = R[a[0]], co = fit.coef, g = Math.sqrt(co[1] * co[1] + co[2] * co[2]);
    var ux = g > 0 ? co[1] / g : 1, uy = g > 0 ? co[2] / g : 0, vals = S.col[a[1]];
    var xs = [], ys = [], cols = [], cells = [], tips = [];
    for (var r = 0; r < S.ids.length; r++) {
      if (!fin(F.cx[r]) || !fin(vals[r])) continue;
      xs.push(F.cx[r] * ux + F.cy[r] * uy); ys.push(vals[r]); cells.push(S.ids[r]);
      cols.push(flag[r] ? "#c0392b" : "#1f7a8c");
      tips.push("cell " + S.ids[r] + (flag[r] ? " (far from the gradient)" : ""));
    }
    var p = new Plot(380, 290, {x: range(xs, 0.05), y: range(ys, 0.1)});
    var x0 = p.xr[0], x1 = p.xr[1];
    p.line([x0, x1], [co[0] + g * x0, co[0] + g * x1], "#222", {lw: 1.4});
    p.line([x0, x1], [co[0] + g * x0 + 3.5 * fit.sd, co[0] + g * x1 + 3.5 * fit.sd], "#999", {dash: "4 3", lw: 1});
    p.line([x0, x1], [co[0] + g * x0 - 3.5 * fit.sd, co[0] + g * x1 - 3.5 * fit.sd], "#999", {dash: "4 3", lw: 1});
    p.pts(xs, ys, null, {cols: cols, cells: cells, tips: tips, r: 3.4});
    for (var k = 0; k < xs.length; k++) if (flag[ROW_OF[cells[k]]]) p.text(xs[k], ys[k], String(cells[k]), {dx: 6, dy: -5, col: "#c0392b"});
    var ang = Math.atan2(-uy, ux) * 180 / Math.PI;
    p.axes({xl: "ROI position along the gradient (pixels)", yl: "RF " + a[2] + " (deg)",
            title: a[2] + ": " + fmt(g, 2) + " deg/pixel, R\u00b2 " + fmt(fit.r2, 2)});
    out.push('<figure class="pop">' + p.svg() + "<figcaption>" + esc("Receptive-field " + a[2] + " against the ROI centroid projected on the fitted gradient (direction " + fmt(ang, 3) +
      " deg from the image x axis, counter-clockwise with row 0 at the top; " + fit.n + " cells in the fit). Line: the fitted plane; dashed: \u00b13.5 robust s.d. (" + fmt(fit.sd, 2) + " deg). Red: outside it in azimuth or elevation.") + "</figcaption></figure>");
  });
  var names = R.flag.map(function (r) { return S.ids[r]; });
  return out.join("") + '<p class="flagged">' + (names.length ? esc(names.length + " cells far from the retinotopic gradient (check for neuropil contamination): ") +
    names.map(function (id) { return '<a href="#cell-' + id + '">' + id + "</a>"; }).join(", ") : "No cell is far from the retinotopic gradient.") + "</p>";
}

function fovSection() {
  if (!S.fov) return;
  var box = document.getElementById("fov-props");
  box.innerHTML = FOV_PROPS.map(function (p) { return '<button data-key="' + p[0] + '">' + esc(p[1]) + "</button>"; }).join("");
  box.addEventListener("click", function (e) { var b = e.target.closest("button"); if (b) drawFov(b.getAttribute("data-key")); });
  drawFov("pref_orientation_deg");
  document.getElementById("retinotopy").innerHTML = retinotopyPlots();
}

population();
fovSection();
var first = location.hash.match(/^#cell-(-?\d+)$/);
if (first && first[1] in CELLS) openCell(first[1], "init");
else if (rows.length) openCell(S.first, "init");
document.body.setAttribute("data-ready", "1");
})();
