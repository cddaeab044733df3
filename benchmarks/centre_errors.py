"""Centre errors of every responsive cell of the held-out validation sessions, over many seeds.

Runs the sessions of ``tests/heldout_rf.py`` (the generator written from the session format alone, as
``benchmarks/validate.py``), computes the maps as :func:`map2d.analysis.analyze_session` does (same
lags, shuffles, seed; traces decay-corrected), locates the fields with
:func:`map2d.fit.spatial.locate_fields` and lists, per responsive driven cell, the centre error in
pixels (the larger side), by regime, model and centre method, with percentiles, the cells beyond the
yardsticks (a third of a pixel, at least 0.5 deg, for linear cells; 0.4 pixel, at least 1 deg, for
complex and ON-OFF cells) and the coverage of the reported 95 % centre intervals.

Usage (from the repository root)::

    python benchmarks/centre_errors.py --seeds 10            # seeds 0..9
    python benchmarks/centre_errors.py --seeds 10 --cache /tmp/maps   # keep the maps between runs
"""

from __future__ import annotations

import argparse
import pickle
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "tests"))

import heldout_rf  # noqa: E402  (tests/heldout_rf.py)

from map2d.contract import load_session  # noqa: E402
from map2d.fit.spatial import locate_fields  # noqa: E402
from map2d.maps import compute_maps  # noqa: E402


def session_maps(name, regime, seed, workdir, cache=None):
    """(MapResult, truth) of one held-out session, as :func:`map2d.analysis.analyze_session` computes it."""
    key = f"{name.replace(' ', '_').replace(',', '')}_{seed}"
    if cache is not None:
        f = Path(cache) / f"{key}.pkl"
        if f.exists():
            return pickle.loads(f.read_bytes())
    folder = Path(workdir) / key
    truth = heldout_rf.make_session(folder, regime, seed)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        session = load_session(folder)
    from map2d.traces import decay_corrected
    from map2d.contract import Traces
    resp = session.responses
    if isinstance(resp, Traces):
        sn = session.sparse_noise
        resp, _ = decay_corrected(resp, "auto", skip_s=sn.frame_interval_s, span_s=(sn.times_s[0], sn.frame_ends_s()[-1]))
    maps = compute_maps(resp, session.sparse_noise, max_lag_s=0.2, rng=np.random.default_rng(0))
    out = (maps, truth)
    if cache is not None:
        Path(cache).mkdir(parents=True, exist_ok=True)
        (Path(cache) / f"{key}.pkl").write_bytes(pickle.dumps(out))
    return out


def score_fields(name, seed, maps, truth, fields):
    """One row per driven responsive cell (and per silent cell): error, method, model, interval hit."""
    g = maps.grid
    pixel = max(g.dx_deg, g.dy_deg)
    col = fields.columns
    rows = []
    for i, c in enumerate(truth["cells"]):
        cls = heldout_rf.cell_class(c)
        resp = bool(maps.responsive[i])
        r = dict(regime=name, seed=seed, id=i, kind=c["kind"], cls=cls, weak=bool(c.get("weak")), responsive=resp)
        if cls != "none" and resp:
            x, y = float(col["center_x_deg"][i]), float(col["center_y_deg"][i])
            err = float(np.hypot(x - c["cx"], y - c["cy"]))
            lo_x, hi_x = col["center_x_ci_low_deg"][i], col["center_x_ci_high_deg"][i]
            lo_y, hi_y = col["center_y_ci_low_deg"][i], col["center_y_ci_high_deg"][i]
            cover = (np.nan if not np.isfinite(lo_x) else
                     float(lo_x <= c["cx"] <= hi_x and lo_y <= c["cy"] <= hi_y))
            true_size = {"gabor": np.sqrt(c.get("sa", np.nan) * c.get("sb", np.nan)),
                         "energy": np.sqrt(c.get("sa", np.nan) * c.get("sb", np.nan) / 2),
                         "dog_on": c.get("sc", np.nan), "dog_off": c.get("sc", np.nan),
                         "onoff": c.get("sc", np.nan)}[c["kind"]]
            tol = max(pixel / 3, 0.5) if cls == "linear" else max(0.4 * pixel, 1.0)
            pz = float(np.nanmax(np.abs(np.stack([maps.on_z[i], maps.off_z[i], maps.linear_z[i]]))))
            r.update(err_deg=err, err_px=err / pixel, tol_deg=tol, miss=err > tol, peak_z=pz,
                     method=str(col["center_method"][i]), model=str(col["model"][i]),
                     check=str(col["fit_check"][i]), map=str(fields.choice.kind[i]),
                     size_err=float(col["size_deg"][i]) / true_size - 1, cover=cover,
                     dx=x - c["cx"], dy=y - c["cy"])
        rows.append(r)
    return rows


def run(seeds, regimes=None, cache=None, locate=locate_fields, workdir=None):
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        for name, regime in heldout_rf.REGIMES.items():
            if regimes and name not in regimes:
                continue
            for seed in seeds:
                maps, truth = session_maps(name, regime, seed, workdir or tmp, cache)
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    fields = locate(maps)
                rows += score_fields(name, seed, maps, truth, fields)
    return rows


def summary(rows, label=""):
    """Text table: per regime x class, n, percentiles 50/95/99/100 of err_px, misses, size error, coverage."""
    d = [r for r in rows if r["cls"] != "none" and r["responsive"]]
    out = [f"== {label} ({len(d)} responsive driven cells)"]
    hdr = f"{'regime':28s} {'cls':8s} {'n':>4s} {'p50':>5s} {'p90':>5s} {'p95':>5s} {'max':>5s} {'miss':>4s} {'size':>5s} {'cover':>5s}"
    out.append(hdr)

    def line(tag, sel):
        e = np.array([r["err_px"] for r in sel])
        s = np.array([abs(r["size_err"]) for r in sel if np.isfinite(r["size_err"])])
        cv = np.array([r["cover"] for r in sel if np.isfinite(r["cover"])])
        out.append(f"{tag:37s} {len(sel):4d} {np.percentile(e, 50):5.2f} {np.percentile(e, 90):5.2f} "
                   f"{np.percentile(e, 95):5.2f} {e.max():5.2f} {sum(r['miss'] for r in sel):4d} "
                   f"{np.median(s) if s.size else np.nan:5.2f} {cv.mean() if cv.size else np.nan:5.2f}")

    for name in dict.fromkeys(r["regime"] for r in d):
        for cls in ("linear", "complex", "onoff"):
            sel = [r for r in d if r["regime"] == name and r["cls"] == cls]
            if sel:
                line(f"{name[:28]:28s} {cls:8s}", sel)
    for cls in ("linear", "complex", "onoff"):
        sel = [r for r in d if r["cls"] == cls]
        if sel:
            line(f"{'ALL':28s} {cls:8s}", sel)
    for key in ("model", "method", "kind"):
        for v in sorted(set(r[key] for r in d)):
            sel = [r for r in d if r[key] == v]
            line(f"{'by ' + key:28s} {v or '-':8s}", sel)
    e = np.array([r["err_px"] for r in d if r["cls"] == "linear"])
    out.append(f"linear err_px percentiles 95/99: {np.percentile(e, 95):.3f} / {np.percentile(e, 99):.3f}")
    silent = [r for r in rows if r["cls"] == "none"]
    out.append(f"false positives: {sum(r['responsive'] for r in silent)}/{len(silent)}; "
               f"driven found: {len(d)}/{sum(r['cls'] != 'none' for r in rows)}")
    out.append("misses:")
    for r in sorted((r for r in d if r["miss"]), key=lambda r: -r["err_px"]):
        out.append(f"  {r['regime']:28s} seed {r['seed']:2d} cell {r['id']} {r['kind']:7s} "
                   f"{'weak' if r['weak'] else 'strong':6s} err {r['err_px']:.2f} px (dx {r['dx']:+.2f}, dy {r['dy']:+.2f} deg) "
                   f"z {r['peak_z']:.1f} {r['method']}/{r['model'] or '-'} check '{r['check']}'")
    return "\n".join(out)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=10)
    ap.add_argument("--cache", default=None, help="folder keeping each session's maps between runs")
    ap.add_argument("--pickle", default=None, help="write the rows here")
    a = ap.parse_args(argv)
    t0, c0 = time.time(), time.process_time()
    rows = run(range(a.seeds), cache=a.cache)
    print(summary(rows, f"{a.seeds} seeds"))
    print(f"{time.time() - t0:.0f} s wall, {time.process_time() - c0:.0f} s CPU")
    if a.pickle:
        Path(a.pickle).write_bytes(pickle.dumps(rows))


if __name__ == "__main__":
    main()
