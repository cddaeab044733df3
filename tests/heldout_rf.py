"""Held-out sessions for the validation matrix, written from the session format alone.

This module imports nothing from ``map2d`` (nor its simulator): it writes ``session.json``,
``sparse_noise.npy``, ``sparse_noise_times.npy``, ``gratings.csv`` (flashed gratings, some regimes)
and ``spikes.npz`` (or ``traces.npy`` + ``trace_times.npy``) itself, with pixel centres from the
format's formula (row 0 at the top): ``x = x0 + (j - (nx - 1) / 2) dx``, ``y = y0 - (i - (ny - 1) / 2)
dy``, and each grating from the format's formula
``s(x, y) = contrast cos(2 pi sf u + phase)``, ``u = (x - xc) cos(ori) + (y - yc) sin(ori)`` (static,
``tf_hz = 0``; ``(xc, yc)`` the phase origin: the grid centre unless the manifest names another). It is
shared by ``tests/test_validation_matrix.py`` and ``benchmarks/validate.py``.

Model cells (truth returned beside the folder)
----------------------------------------------
Every cell sees the frame on screen ``latency_s`` earlier through a kernel averaged over each pixel
(3 x 3 sub-samples: a spot fills its pixel). ``drive = <kernel, frame>``.

- ``gabor`` / ``dog_on`` / ``dog_off`` (linear spatial stage): ``rate = max(0, spont + gain (drive - thr))``.
  With a maintained discharge (``spont`` 20-30 spikes/s, ``thr = 0``) dark spots on an ON region push
  the rate below the spontaneous level, so the ON + OFF map is near zero where the field is; with a
  threshold (``thr > 0``, ``spont = 0``) the response is strongly rectified.
- ``energy`` (complex): ``spont + gain (<even, frame>^2 + <odd, frame>^2)`` with a quadrature Gabor pair
  (Adelson & Bergen 1985, J Opt Soc Am A 2:284).
- ``onoff``: ``spont + gain |<blob, frame>|`` with a Gaussian blob: bright and dark spots both excite
  the same place (an ON-OFF cell).
- ``none``: spontaneous firing only.

A biphasic time course (``biphasic = b``) subtracts ``b`` times the drive of the frame shown one frame
before (a transient cell).

Flashed gratings (regimes with ``gratings``) follow the sparse noise, one static grating a frame (random
orientation x SF x phase, some blanks), and the same cells see them through the same rate function:
the drive is the integral of the (continuous) kernel times the grating over a fine 0.25-deg grid,
scaled per cell so that the strongest grating of the design drives the cell as much as ``peak`` (in
the units of a spot on a pixel where the pixel-averaged kernel is 1); for an energy cell the quadrature
pair's drives are scaled together. A cell with ``lost_in_gratings`` fires at its spontaneous rate
during the gratings (a unit lost between the two stimuli): it has a map and no grating response.

Spikes are Poisson at 2-ms resolution. For traces, the spikes are convolved with a double-exponential
indicator kernel (rise ``tau_rise_s``, decay ``tau_decay_s``), sampled at ``imaging_hz`` and Gaussian
noise is added.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
from scipy.signal import lfilter

DT = 0.002


def pixel_centres(grid):
    """(X, Y) of every pixel ``(ny, nx)`` from the session-format formula (row 0 at the top)."""
    ny, nx = grid["shape"]
    x0, y0 = grid["center"]
    dx, dy = grid["spacing"]
    j, i = np.meshgrid(np.arange(nx), np.arange(ny))
    return x0 + (j - (nx - 1) / 2) * dx, y0 - (i - (ny - 1) / 2) * dy


def _gabor(X, Y, c, phase_deg):
    th = np.deg2rad(c["theta"])
    a = (X - c["cx"]) * np.cos(th) + (Y - c["cy"]) * np.sin(th)
    b = -(X - c["cx"]) * np.sin(th) + (Y - c["cy"]) * np.cos(th)
    env = np.exp(-a ** 2 / (2 * c["sa"] ** 2) - b ** 2 / (2 * c["sb"] ** 2))
    return env * np.cos(2 * np.pi * c["f"] * a + np.deg2rad(phase_deg))


def kernels(cell, X, Y):
    """The cell's spatial kernels at (X, Y): a list of one (linear, onoff) or two (energy) arrays."""
    kind = cell["kind"]
    if kind == "none":
        return [np.zeros_like(X)]
    if kind in ("dog_on", "dog_off"):
        r2 = (X - cell["cx"]) ** 2 + (Y - cell["cy"]) ** 2
        sc, ss, w = cell["sc"], cell["ss"], cell.get("w", 0.5)
        k = np.exp(-r2 / (2 * sc ** 2)) - w * (sc / ss) ** 2 * np.exp(-r2 / (2 * ss ** 2))
        return [k if kind == "dog_on" else -k]
    if kind == "onoff":
        r2 = (X - cell["cx"]) ** 2 + (Y - cell["cy"]) ** 2
        return [np.exp(-r2 / (2 * cell["sc"] ** 2))]
    if kind == "gabor":
        return [_gabor(X, Y, cell, cell["psi"])]
    if kind == "energy":
        return [_gabor(X, Y, cell, cell["psi"]), _gabor(X, Y, cell, cell["psi"] + 90.0)]
    raise ValueError(kind)


def pixel_kernels(cell, grid):
    """Kernels averaged over each pixel, each ``(ny * nx,)``."""
    X, Y = pixel_centres(grid)
    dx, dy = grid["spacing"]
    offs = (np.arange(3) - 1) / 3.0
    out = None
    for ox in offs:
        for oy in offs:
            ks = kernels(cell, X + ox * dx, Y + oy * dy)
            out = [k / 9.0 for k in ks] if out is None else [o + k / 9.0 for o, k in zip(out, ks)]
    return [o.ravel() for o in out]


def frame_rates(cell, drives):
    """Rate (spikes/s) for each frame's drive(s): ``drives`` is a list of (frames,) arrays."""
    kind = cell["kind"]
    spont, gain = cell.get("spont", 1.0), cell.get("gain", 0.0)
    if kind == "none":
        return np.full(drives[0].shape, spont)
    if kind == "energy":
        return spont + gain * (drives[0] ** 2 + drives[1] ** 2)
    if kind == "onoff":
        return spont + gain * np.abs(drives[0])
    return np.maximum(0.0, spont + gain * (drives[0] - cell.get("thr", 0.0)))


FINE_DEG = 0.25         # integration grid of the grating drives (>= 22 points a cycle at 0.18 cpd)


def _extent_deg(cell):
    """Half-width of the patch around the kernel that holds it (4 sd of its widest part)."""
    k = cell["kind"]
    if k in ("gabor", "energy"):
        return 4.0 * max(cell["sa"], cell["sb"])
    if k in ("dog_on", "dog_off"):
        return 4.0 * cell["ss"]
    if k == "onoff":
        return 4.0 * cell["sc"]
    return 0.0


def grating_drives(cell, ori_deg, sf_cpd, phase_deg, origin):
    """Integral of each of the cell's kernels times each static grating (contrast 1), ``deg^2``.

    ``ori_deg``, ``sf_cpd``, ``phase_deg``: equal-length arrays (one entry per grating); ``origin`` the
    phase origin ``(xc, yc)``. Returns a list (one array per kernel, as :func:`kernels`)."""
    half = _extent_deg(cell)
    if half == 0.0:
        return [np.zeros(len(ori_deg))]
    v = np.arange(-half, half + FINE_DEG / 2, FINE_DEG)
    X, Y = np.meshgrid(cell["cx"] + v, cell["cy"] + v)
    ks = [k.ravel() * FINE_DEG ** 2 for k in kernels(cell, X, Y)]
    # cos(a + p) = cos a cos p - sin a sin p: one cosine and one sine image per orientation x SF
    keys = np.stack([np.asarray(ori_deg, float), np.asarray(sf_cpd, float)], 1)
    uniq, inv = np.unique(keys, axis=0, return_inverse=True)
    th = np.deg2rad(uniq[:, 0])[:, None]
    u = (X.ravel() - origin[0]) * np.cos(th) + (Y.ravel() - origin[1]) * np.sin(th)
    a = 2 * np.pi * uniq[:, 1][:, None] * u
    cs = np.stack(ks) @ np.concatenate([np.cos(a), np.sin(a)]).T          # (kernels, 2 x conditions)
    p = np.deg2rad(np.asarray(phase_deg, float))
    inv = np.ravel(inv)
    n = len(uniq)
    return [cm[:n][inv] * np.cos(p) - cm[n:][inv] * np.sin(p) for cm in cs]


def _grating_design(rng, g, t0):
    """Columns of ``gratings.csv`` for ``g`` (a regime's ``gratings`` dict), starting at ``t0``."""
    frame_s = g.get("frame_s", 0.1)
    n = int(round(g["minutes"] * 60 / frame_s))
    onset = t0 + np.arange(n) * frame_s + rng.normal(0, 2e-4, n)
    blank = rng.random(n) < g.get("blank", 0.1)
    oris, sfs, phases = (np.asarray(g[k], float) for k in ("oris", "sfs", "phases"))
    return dict(onset_s=onset, offset_s=onset + frame_s,
                orientation_deg=np.where(blank, 0.0, oris[rng.integers(0, oris.size, n)]),
                sf_cpd=np.where(blank, 0.0, sfs[rng.integers(0, sfs.size, n)]),
                phase_deg=np.where(blank, 0.0, phases[rng.integers(0, phases.size, n)]),
                contrast=np.where(blank, 0.0, g.get("contrast", 1.0)), tf_hz=np.zeros(n))


def make_session(folder, regime, seed):
    """Write one session of ``regime`` (a dict, see :data:`REGIMES`) into ``folder``; return the truth.

    Truth: ``{"cells": [cell dicts with "id"], "frame_s", "latency_s"}``.
    """
    rng = np.random.default_rng(seed)
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    grid = regime["grid"]
    ny, nx = grid["shape"]
    P = ny * nx
    frame_s = regime.get("frame_s", 0.1)
    n_frames = int(round(regime["minutes"] * 60 / frame_s))
    spots = regime.get("spots", 2)
    frames = np.zeros((n_frames, P), dtype=np.int8)
    rows = np.repeat(np.arange(n_frames), spots)
    # distinct pixels per frame: the first `spots` of a random permutation
    pix = np.argsort(rng.random((n_frames, P)), axis=1)[:, :spots].ravel()
    frames[rows, pix] = rng.choice(np.array([-1, 1], dtype=np.int8), rows.size)
    onsets = 1.0 + np.arange(n_frames) * frame_s + rng.normal(0, 2e-4, n_frames)
    end = onsets[-1] + frame_s
    latency = regime.get("latency_s", 0.045)
    # every stimulus event (a frame shows until the next onset; the last one for a frame)
    ev_on, ev_off = onsets, np.r_[onsets[1:], end]
    g = regime.get("gratings")
    if g is not None:
        design = _grating_design(rng, g, end + 1.0)
        origin = g.get("origin") or grid["center"]
        ev_on, ev_off = np.r_[ev_on, design["onset_s"]], np.r_[ev_off, design["offset_s"]]
        end = ev_off[-1]

    cells = [dict(c, id=i) for i, c in enumerate(regime["cells"])]
    t = np.arange(0.0, end + 2.0, DT)
    fidx = np.searchsorted(ev_on, t - latency, side="right") - 1
    shown = (fidx >= 0) & (t - latency < ev_off[np.clip(fidx, 0, None)])
    fidx_prev = np.searchsorted(ev_on, t - latency - frame_s, side="right") - 1
    shown_prev = (fidx_prev >= 0) & (t - latency - frame_s < ev_off[np.clip(fidx_prev, 0, None)])
    counts = np.zeros((len(cells), t.size))
    for ci, c in enumerate(cells):
        ks = pixel_kernels(c, grid)
        d = [frames.astype(float) @ k for k in ks]
        if g is not None:
            gd = grating_drives(c, design["orientation_deg"], design["sf_cpd"], design["phase_deg"], origin)
            amp = np.sqrt(sum(x ** 2 for x in gd))[design["contrast"] > 0]
            scale = g.get("peak", 1.0) / amp.max() if amp.size and amp.max() > 0 else 0.0
            if c.get("lost_in_gratings"):
                scale = 0.0
            d = [np.r_[di, scale * design["contrast"] * x] for di, x in zip(d, gd)]
        now = [np.where(shown, di[np.clip(fidx, 0, None)], 0.0) for di in d]
        b = c.get("biphasic", 0.0)
        if b:
            prev = [np.where(shown_prev, di[np.clip(fidx_prev, 0, None)], 0.0) for di in d]
            now = [n - b * p for n, p in zip(now, prev)]
        counts[ci] = rng.poisson(frame_rates(c, now) * DT)

    np.save(folder / "sparse_noise.npy", frames.reshape(n_frames, ny, nx))
    np.save(folder / "sparse_noise_times.npy", onsets.astype(np.float64))
    manifest = {"sparse_noise": {"frames": "sparse_noise.npy", "times": "sparse_noise_times.npy",
                                 "grid": {"center_deg": list(grid["center"]),
                                          "spacing_deg": list(grid["spacing"])}}}
    if g is not None:
        names = ["onset_s", "offset_s", "orientation_deg", "sf_cpd", "phase_deg", "contrast", "tf_hz"]
        lines = [",".join(names)] + [",".join(repr(float(design[k][i])) for k in names)
                                     for i in range(design["onset_s"].size)]
        (folder / "gratings.csv").write_text("\n".join(lines) + "\n")
        manifest["gratings"] = {"table": "gratings.csv"}
        if g.get("origin"):
            manifest["gratings"]["phase_origin_deg"] = list(g["origin"])
    if regime.get("responses", "spikes") == "spikes":
        cell_of, k = np.nonzero(counts)
        n = counts[cell_of, k].astype(int)
        times = np.repeat(t[k], n) + rng.uniform(0, DT, n.sum())
        cell = np.repeat(cell_of, n)
        order = np.argsort(times)
        np.savez(folder / "spikes.npz", time_s=times[order], cell=cell[order].astype(np.int64))
        manifest["responses"] = {"kind": "spikes", "file": "spikes.npz"}
    else:
        tr, td = regime["tau_rise_s"], regime["tau_decay_s"]
        ad, ar = np.exp(-DT / td), np.exp(-DT / tr)
        t_pk = np.log(td / tr) * td * tr / (td - tr)
        peak = np.exp(-t_pk / td) - np.exp(-t_pk / tr)
        ca = lfilter([1.0], [1.0, -ad], counts, axis=1) - lfilter([1.0], [1.0, -ar], counts, axis=1)
        ca *= regime.get("amp_per_spike", 0.1) / peak
        t_img = 0.2 + np.arange(0.0, t[-1] - 0.3, 1.0 / regime["imaging_hz"])
        traces = np.vstack([np.interp(t_img, t, c) for c in ca])
        traces += rng.normal(0, regime.get("noise_sd", 0.03), traces.shape)
        np.save(folder / "traces.npy", traces.astype(np.float32))
        np.save(folder / "trace_times.npy", t_img)
        manifest["responses"] = {"kind": "traces", "file": "traces.npy", "times": "trace_times.npy"}
    (folder / "session.json").write_text(json.dumps(manifest, indent=2))
    return {"cells": cells, "frame_s": frame_s, "latency_s": latency, "gratings": g is not None}


# ------------------------------------------------------------------------------------------------
# the regimes: what labs meet
# ------------------------------------------------------------------------------------------------
SQUARE = dict(shape=(10, 14), center=(4.0, -2.0), spacing=(2.0, 2.0))
ANISO = dict(shape=(12, 10), center=(-3.0, 5.0), spacing=(2.5, 1.6))


def _cells(strong, weak, extra=()):
    """Strong copies of ``strong`` cells, weak (gain / 2.5) copies, then two unresponsive cells."""
    out = [dict(c) for c in strong]
    out += [dict(c, gain=c["gain"] / 2.5, weak=True) for c in weak]
    out += [dict(kind="none", spont=s) for s in (2.0, 15.0)]
    return out + list(extra)


GAB = dict(kind="gabor", f=0.12, sa=2.4, sb=3.2)
DOG = dict(sc=1.6, ss=4.0)

REGIMES = {
    # half-wave rectified cells, little spontaneous firing
    "quiet": dict(grid=SQUARE, minutes=5.0, spots=2, cells=_cells(
        [dict(GAB, cx=0.5, cy=1.3, theta=30.0, psi=0.0, gain=60.0, spont=1.0),
         dict(DOG, kind="dog_on", cx=9.3, cy=-5.2, gain=60.0, spont=1.0),
         dict(DOG, kind="dog_off", cx=-4.6, cy=-6.1, gain=60.0, spont=1.0)],
        [dict(GAB, cx=10.1, cy=3.4, theta=120.0, psi=90.0, gain=60.0, spont=1.0)])),
    # maintained discharge: dark spots push the rate below the spontaneous level
    "maintained": dict(grid=SQUARE, minutes=5.0, spots=2, cells=_cells(
        [dict(GAB, cx=1.2, cy=-4.1, theta=75.0, psi=90.0, gain=60.0, spont=25.0),
         dict(GAB, cx=9.0, cy=2.2, theta=0.0, psi=0.0, gain=60.0, spont=30.0),
         dict(DOG, kind="dog_on", cx=-5.3, cy=3.1, gain=60.0, spont=20.0)],
        [dict(GAB, cx=-3.7, cy=-5.5, theta=150.0, psi=0.0, gain=60.0, spont=25.0)])),
    # rectification threshold, 1 spot a frame
    "threshold": dict(grid=SQUARE, minutes=5.0, spots=1, cells=_cells(
        [dict(GAB, cx=-1.0, cy=2.6, theta=100.0, psi=0.0, gain=80.0, spont=0.0, thr=0.15),
         dict(DOG, kind="dog_off", cx=8.2, cy=-3.3, gain=80.0, spont=0.0, thr=0.1)],
        [dict(GAB, cx=6.0, cy=4.5, theta=45.0, psi=180.0, gain=80.0, spont=0.0, thr=0.15)])),
    # complex and ON-OFF cells
    "on-off": dict(grid=SQUARE, minutes=5.0, spots=2, cells=_cells(
        [dict(GAB, kind="energy", cx=2.0, cy=-1.0, theta=60.0, psi=0.0, gain=60.0, spont=3.0),
         dict(kind="onoff", cx=-6.2, cy=4.0, sc=1.8, gain=25.0, spont=5.0),
         dict(kind="onoff", cx=10.4, cy=-5.0, sc=1.5, gain=25.0, spont=10.0)],
        [dict(GAB, kind="energy", cx=8.5, cy=3.5, theta=0.0, psi=0.0, gain=60.0, spont=3.0)])),
    # fields within 1.5 deg of the grid's edge (grid spans x -10..18, y -11..7 at pixel edges)
    "edge": dict(grid=SQUARE, minutes=5.0, spots=2, cells=_cells(
        [dict(GAB, cx=-8.8, cy=0.5, theta=0.0, psi=0.0, gain=60.0, spont=2.0),
         dict(DOG, kind="dog_on", cx=4.0, cy=6.0, gain=60.0, spont=2.0),
         dict(DOG, kind="dog_off", cx=17.0, cy=-9.8, gain=60.0, spont=2.0)],
        [dict(GAB, cx=5.0, cy=-10.0, theta=90.0, psi=0.0, gain=60.0, spont=2.0)])),
    # transient (biphasic) cells, 20-Hz frames, 4 spots a frame
    "biphasic": dict(grid=SQUARE, minutes=4.0, frame_s=0.05, spots=4, latency_s=0.03, cells=_cells(
        [dict(GAB, cx=2.5, cy=0.0, theta=45.0, psi=0.0, gain=60.0, spont=4.0, biphasic=0.7),
         dict(DOG, kind="dog_on", cx=-4.0, cy=-5.0, gain=60.0, spont=4.0, biphasic=0.7),
         dict(GAB, kind="energy", cx=10.0, cy=1.0, theta=120.0, psi=0.0, gain=60.0, spont=4.0)],
        [dict(GAB, cx=8.0, cy=-6.0, theta=0.0, psi=90.0, gain=60.0, spont=4.0, biphasic=0.7)])),
    # anisotropic pixels (2.5 x 1.6 deg), 3 spots a frame
    "anisotropic": dict(grid=ANISO, minutes=5.0, spots=3, cells=_cells(
        [dict(GAB, cx=-6.0, cy=8.0, theta=20.0, psi=0.0, gain=60.0, spont=2.0),
         dict(DOG, kind="dog_off", cx=2.5, cy=1.0, gain=60.0, spont=8.0),
         dict(GAB, kind="energy", cx=-4.0, cy=1.5, theta=100.0, psi=0.0, gain=60.0, spont=2.0)],
        [dict(DOG, kind="dog_on", cx=4.0, cy=9.5, gain=60.0, spont=2.0)])),
    # imaging with a slow indicator (rise 0.1 s, decay 1 s), 30-Hz samples
    "slow indicator": dict(grid=SQUARE, minutes=8.0, spots=2, responses="traces", tau_rise_s=0.1,
                           tau_decay_s=1.0, imaging_hz=30.0, noise_sd=0.03, cells=_cells(
        [dict(GAB, cx=0.0, cy=-2.0, theta=60.0, psi=0.0, gain=60.0, spont=2.0),
         dict(DOG, kind="dog_on", cx=9.0, cy=3.0, gain=60.0, spont=2.0),
         dict(kind="onoff", cx=-5.0, cy=-6.0, sc=1.8, gain=25.0, spont=3.0)],
        [dict(DOG, kind="dog_off", cx=10.5, cy=-6.0, gain=60.0, spont=2.0)])),
}


# flashed gratings after 5 min of sparse noise: 6 orientations x 4 SFs (the 2-deg grid's Nyquist
# frequency is 0.25 cpd) x 4 or 8 phases, 10 Hz, 10 % blanks, 3 min; the phase origin the grid centre
# (manifest silent) or named off it
GRATINGS = dict(oris=[0.0, 30.0, 60.0, 90.0, 120.0, 150.0], sfs=[0.04, 0.08, 0.12, 0.18], minutes=3.0,
                blank=0.1, peak=1.0)
PHASES4 = [0.0, 90.0, 180.0, 270.0]
PHASES8 = [45.0 * k for k in range(8)]


def _grating_cells(shift):
    """Linear (Gabor even and odd, DoG), complex and ON-OFF cells, a weak Gabor, two silent cells and a
    cell lost before the gratings; ``shift`` (deg) moves the fields so that regimes differ."""
    dx, dy = shift
    return _cells(
        [dict(GAB, cx=0.5 + dx, cy=1.3 + dy, theta=30.0, psi=0.0, gain=60.0, spont=2.0),
         dict(GAB, cx=9.0 + dx, cy=-5.0 + dy, theta=120.0, psi=90.0, gain=60.0, spont=2.0),
         dict(DOG, kind="dog_on", cx=-5.3 + dx, cy=3.1 + dy, gain=60.0, spont=2.0),
         dict(GAB, kind="energy", cx=2.0 + dx, cy=-6.0 + dy, theta=60.0, psi=0.0, gain=60.0, spont=3.0),
         dict(kind="onoff", cx=-5.0 + dx, cy=-6.0 + dy, sc=1.8, gain=40.0, spont=5.0)],
        [dict(GAB, cx=10.0 + dx, cy=3.0 + dy, theta=75.0, psi=0.0, gain=60.0, spont=2.0)],
        [dict(DOG, kind="dog_off", cx=13.0 + dx, cy=-1.0 + dy, gain=60.0, spont=2.0, lost_in_gratings=True)])


REGIMES.update({
    # flashed gratings for the same cells: 4 phases, phase origin = grid centre
    "gratings, 4 phases": dict(grid=SQUARE, minutes=5.0, spots=2, cells=_grating_cells((0.0, 0.0)),
                               gratings=dict(GRATINGS, phases=PHASES4)),
    # 8 phases
    "gratings, 8 phases": dict(grid=SQUARE, minutes=5.0, spots=2, cells=_grating_cells((-1.3, 0.8)),
                               gratings=dict(GRATINGS, phases=PHASES8)),
    # 4 phases, the phase origin named in the manifest, off the grid (its centre is (4, -2))
    "gratings, origin off centre": dict(grid=SQUARE, minutes=5.0, spots=2, cells=_grating_cells((0.7, -1.1)),
                                        gratings=dict(GRATINGS, phases=PHASES4, origin=(-17.0, 12.5))),
})


def cell_class(cell):
    """'linear' (Gabor, DoG), 'complex' (energy), 'onoff' or 'none'."""
    return {"gabor": "linear", "dog_on": "linear", "dog_off": "linear", "energy": "complex",
            "onoff": "onoff", "none": "none"}[cell["kind"]]


def score(cells, truth, spacing_deg, peak_z):
    """Per driven or silent cell, what the analysis got against the truth.

    ``cells``: the ``cells.csv`` columns (dict of lists, rows in cell-id order as written here);
    ``spacing_deg``: ``(dx, dy)``; ``peak_z``: (cells,) largest ``|z|`` of any map of the cell.
    Returns a list of dicts: ``id, kind, cls, weak, responsive, err_deg, err_px`` (error over the larger
    pixel side), ``peak_z``, ``fitted_map``, ``polarity``, ``center_method``, ``size_err`` (fitted size
    over the true envelope sd, minus 1: Gabor, DoG centre and ON-OFF blob sd, an energy cell's squared
    envelope; NaN without a fitted size); ``sees_gratings`` (the session has gratings and they drive
    the cell), ``agreement``, ``linear`` (True, False or None), ``linear_reason`` and ``covered`` (the 95 %
    centre intervals hold the true centre: True, False, or None without intervals).
    """
    out = []
    pixel = max(spacing_deg)
    for i, c in enumerate(truth["cells"]):
        cls = cell_class(c)
        resp = bool(cells["responsive"][i])
        cx, cy = float(cells["center_x_deg"][i]), float(cells["center_y_deg"][i])
        err = float(np.hypot(cx - c["cx"], cy - c["cy"])) if cls != "none" and resp else np.nan
        true_size = {"gabor": np.sqrt(c.get("sa", np.nan) * c.get("sb", np.nan)),
                     # energy: the map is the squared envelope, whose sd is the envelope's / sqrt 2
                     "energy": np.sqrt(c.get("sa", np.nan) * c.get("sb", np.nan) / 2),
                     "dog_on": c.get("sc", np.nan), "dog_off": c.get("sc", np.nan),
                     "onoff": c.get("sc", np.nan), "none": np.nan}[c["kind"]]
        size = float(cells["size_deg"][i]) if "size_deg" in cells else np.nan
        out.append(dict(id=c["id"], kind=c["kind"], cls=cls, weak=bool(c.get("weak", False)),
                        responsive=resp, err_deg=err, err_px=err / pixel, peak_z=float(peak_z[i]),
                        fitted_map=str(cells.get("fitted_map", [""] * len(truth["cells"]))[i]),
                        polarity=str(cells.get("polarity", [""] * len(truth["cells"]))[i]),
                        center_method=str(cells.get("center_method", [""] * len(truth["cells"]))[i]),
                        model=str(cells.get("model", [""] * len(truth["cells"]))[i]),
                        overlap=float(cells["onoff_overlap"][i]) if "onoff_overlap" in cells else np.nan,
                        latency_s=float(cells["latency_s"][i]) if "latency_s" in cells else np.nan,
                        peak_lag_s=float(cells["peak_lag_s"][i]),
                        sees_gratings=(bool(truth.get("gratings")) and cls != "none"
                                       and not c.get("lost_in_gratings", False)),
                        agreement=_num(cells.get("agreement", [None] * len(truth["cells"]))[i]),
                        linear=_verdict(cells.get("linear", [None] * len(truth["cells"]))[i]),
                        linear_reason=str(cells.get("linear_reason", [""] * len(truth["cells"]))[i] or ""),
                        size_err=size / true_size - 1 if resp and np.isfinite(size) else np.nan,
                        covered=_covered(cells, i, c) if cls != "none" and resp else None))
    return out


def _covered(cells, i, c):
    """Whether the cell's 95 % centre intervals (x and y) both hold the true centre; None without them."""
    ends = [_num(cells.get(f"center_{a}_ci_{e}_deg", [None] * (i + 1))[i]) for a in "xy" for e in ("low", "high")]
    if not np.all(np.isfinite(ends)):
        return None
    return bool(ends[0] <= c["cx"] <= ends[1] and ends[2] <= c["cy"] <= ends[3])


def _num(v):
    """A cells-table value as a float (NaN when empty)."""
    try:
        return float(v) if v not in (None, "") else np.nan
    except (TypeError, ValueError):
        return np.nan


def _verdict(v):
    """``linear`` as True, False or None (empty)."""
    if v in (None, "") or (isinstance(v, float) and np.isnan(v)):
        return None
    if isinstance(v, str):
        return {"true": True, "false": False}.get(v.lower())
    return bool(v)
