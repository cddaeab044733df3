"""Held-out check of the map-grating agreement on a mouse-like design, from ``shared/contract.md`` alone.

The generator below imports nothing from map2d (the analysis runs only through ``map2d analyze``): it
writes ``session.json``, ``sparse_noise.npy``, ``sparse_noise_times.npy``, ``gratings.csv`` and
``spikes.npz``, renders every stimulus on a fine grid around each model cell with the contract formulas

    sparse noise: a spot fills its grid pixel (+1 bright, -1 dark, 0 background);
    gratings: ``s(x, y, t) = contrast * cos(2 pi sf u - 2 pi tf (t - onset) + phase)``,
    ``u = (x - xc) cos(ori) + (y - yc) sin(ori)``,

and integrates it against the cell's kernel. The design is that of mouse work: 5-deg spots on a
60 x 40 deg grid (grid Nyquist 0.1 cpd), flashed gratings at 0.02-0.32 cpd, drifting gratings.

Model cells (truth kept here): linear Gabor simple cells (half-wave rectified drive; Jones & Palmer
1987, J Neurophysiol 58:1233, for the kernel), untuned cells driven alike by every grating (an
unmodulated rate increase during each grating) and a silent cell. Acceptance of issue 14: the linear
cells' median agreement reaches 0.9, and the untuned cells are never called simple (Skottun et al.
1991, Vision Res 31:1079: F1/F0 > 1).
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest

from map2d.cli import main as map2d_main

GRID_CENTER = (0.0, 10.0)
GRID_SPACING = (5.0, 5.0)
GRID_SHAPE = (8, 12)                # ny, nx: 40 x 60 deg
SN_FRAME_S = 0.1                    # 10 Hz sparse noise
SN_N = 6000                         # 10 minutes
SN_SPOTS = 4                        # spots per frame

FLASH_ORIS = np.arange(8) * 22.5
FLASH_SFS = np.array([0.02, 0.04, 0.08, 0.16, 0.32])
FLASH_PHASES = np.array([0.0, 90.0, 180.0, 270.0])
FLASH_FRAME_S = 0.1
FLASH_N = 3000                      # 5 minutes
FLASH_CONTRAST = 1.0
BLANK_FRACTION = 0.1

DRIFT_DIRS = np.arange(8) * 45.0
DRIFT_SFS = np.array([0.04])
DRIFT_TF = 2.0
DRIFT_ON_S, DRIFT_OFF_S, DRIFT_REPEATS = 2.0, 1.0, 6

LATENCY_S, EVOKED_S = 0.11, 0.05    # responses fall in the lag-1 frame (0.1-0.2 s)
DT = 0.001
PIX = 0.25                          # fine integration grid (deg): 12 points per cycle at 0.32 cpd

CELLS = [
    # Gabor: exp(-(a^2 / 2 sa^2 + b^2 / 2 sb^2)) cos(2 pi f0 a + psi), a along the wave vector theta
    dict(id=1, kind="simple", cx=-12.0, cy=15.0, theta=30.0, f0=0.04, sa=7.0, sb=9.0, psi=20.0, gain=200.0),
    dict(id=2, kind="simple", cx=10.0, cy=5.0, theta=100.0, f0=0.06, sa=6.0, sb=8.0, psi=-70.0, gain=200.0),
    dict(id=3, kind="simple", cx=0.0, cy=18.0, theta=150.0, f0=0.05, sa=6.5, sb=7.0, psi=120.0, gain=200.0),
    dict(id=4, kind="simple", cx=-5.0, cy=4.0, theta=70.0, f0=0.08, sa=5.0, sb=7.0, psi=0.0, gain=200.0),
    dict(id=5, kind="simple", cx=15.0, cy=16.0, theta=10.0, f0=0.03, sa=8.0, sb=8.0, psi=60.0, gain=200.0),
    dict(id=6, kind="untuned", gain=15.0),
    dict(id=7, kind="untuned", gain=15.0),
    dict(id=8, kind="untuned", gain=15.0),
    dict(id=9, kind="silent"),
]
BASE_HZ = 2.0


def _grid_axes():
    ny, nx = GRID_SHAPE
    x = GRID_CENTER[0] + (np.arange(nx) - (nx - 1) / 2) * GRID_SPACING[0]
    y = GRID_CENTER[1] - (np.arange(ny) - (ny - 1) / 2) * GRID_SPACING[1]      # row 0 at the top
    return x, y


def _patch(c):
    half = 4.5 * max(c["sa"], c["sb"])
    v = np.arange(-half, half + PIX / 2, PIX)
    x, y = np.meshgrid(c["cx"] + v, c["cy"] + v)
    return x, y


def _kernel(c, x, y):
    th = np.deg2rad(c["theta"])
    a = (x - c["cx"]) * np.cos(th) + (y - c["cy"]) * np.sin(th)
    b = -(x - c["cx"]) * np.sin(th) + (y - c["cy"]) * np.cos(th)
    env = np.exp(-(a**2 / (2 * c["sa"] ** 2) + b**2 / (2 * c["sb"] ** 2)))
    return env * np.cos(2 * np.pi * c["f0"] * a + np.deg2rad(c["psi"]))


def _pixel_weights(c):
    """The kernel integrated over each grid pixel (a spot fills its pixel), (ny, nx)."""
    x, y = _patch(c)
    k = _kernel(c, x, y) * PIX * PIX
    gx, gy = _grid_axes()
    ix = np.round((x - gx[0]) / GRID_SPACING[0]).astype(int)
    iy = np.round((gy[0] - y) / GRID_SPACING[1]).astype(int)
    ok = (ix >= 0) & (ix < gx.size) & (iy >= 0) & (iy < gy.size)
    w = np.zeros(GRID_SHAPE)
    np.add.at(w, (iy[ok], ix[ok]), k[ok])
    return w


def _static_drive(c, ori, sf, phase, origin):
    """Integral of the kernel times the static grating, for paired arrays (each distinct grating
    rendered once)."""
    x, y = _patch(c)
    k = _kernel(c, x, y) * PIX * PIX
    keys = np.stack([np.ravel(ori), np.ravel(sf), np.ravel(phase)], axis=1)
    uniq, inv = np.unique(keys, axis=0, return_inverse=True)
    vals = np.empty(len(uniq))
    for j, (o, f, p) in enumerate(uniq):
        th = np.deg2rad(o)
        u = (x - origin[0]) * np.cos(th) + (y - origin[1]) * np.sin(th)
        vals[j] = np.sum(k * np.cos(2 * np.pi * f * u + np.deg2rad(p)))
    return vals[np.ravel(inv)].reshape(np.shape(ori))


def _design(rng, t0):
    n = FLASH_N
    onset = t0 + np.arange(n) * FLASH_FRAME_S
    blank = rng.random(n) < BLANK_FRACTION
    cols = dict(onset_s=onset, offset_s=onset + FLASH_FRAME_S,
                orientation_deg=np.where(blank, 0.0, FLASH_ORIS[rng.integers(0, FLASH_ORIS.size, n)]),
                sf_cpd=np.where(blank, 0.0, FLASH_SFS[rng.integers(0, FLASH_SFS.size, n)]),
                phase_deg=np.where(blank, 0.0, FLASH_PHASES[rng.integers(0, FLASH_PHASES.size, n)]),
                contrast=np.where(blank, 0.0, FLASH_CONTRAST), tf_hz=np.zeros(n))
    t = onset[-1] + FLASH_FRAME_S + 2.0
    conds = [(d, s) for d in DRIFT_DIRS for s in DRIFT_SFS] * DRIFT_REPEATS
    order = rng.permutation(len(conds))
    d_on = t + np.arange(len(conds)) * (DRIFT_ON_S + DRIFT_OFF_S)
    m = len(conds)
    drift = dict(onset_s=d_on, offset_s=d_on + DRIFT_ON_S, orientation_deg=np.array([conds[i][0] for i in order]),
                 sf_cpd=np.array([conds[i][1] for i in order]), phase_deg=np.zeros(m), contrast=np.ones(m),
                 tf_hz=np.full(m, DRIFT_TF))
    cols = {k: np.concatenate([cols[k], drift[k]]) for k in cols}
    return cols, float(d_on[-1] + DRIFT_ON_S + 2.0)


def write_session(folder: Path, rng) -> None:
    rng = np.random.default_rng(rng)
    folder.mkdir(parents=True)
    ny, nx = GRID_SHAPE
    frames = np.zeros((SN_N, ny, nx), np.int8)
    flat = np.argsort(rng.random((SN_N, ny * nx)), axis=1)[:, :SN_SPOTS]   # distinct pixels in a frame
    frames.reshape(SN_N, -1)[np.arange(SN_N)[:, None], flat] = rng.choice([-1, 1], (SN_N, SN_SPOTS))
    sn_times = 1.0 + np.arange(SN_N) * SN_FRAME_S
    np.save(folder / "sparse_noise.npy", frames)
    np.save(folder / "sparse_noise_times.npy", sn_times)
    cols, t_end = _design(rng, sn_times[-1] + 3.0)
    names = ["onset_s", "offset_s", "orientation_deg", "sf_cpd", "phase_deg", "contrast", "tf_hz"]
    with open(folder / "gratings.csv", "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(names)
        for i in range(cols["onset_s"].size):
            w.writerow([repr(float(cols[k][i])) for k in names])
    origin = GRID_CENTER                 # phase origin omitted in the manifest: the grid centre
    nb = int(np.ceil(t_end / DT))
    evoked = int(round(EVOKED_S / DT))
    static = cols["tf_hz"] == 0
    fl, dr = np.flatnonzero(static), np.flatnonzero(~static)
    times, ids = [], []
    for c in CELLS:
        rate = np.full(nb, BASE_HZ)
        if c["kind"] == "simple":
            # sparse noise and flashed gratings: rectified drive in [onset + latency, + EVOKED_S)
            d_sn = np.einsum("tij,ij->t", frames.astype(float), _pixel_weights(c))
            d_fl = np.where(cols["contrast"][fl] > 0, cols["contrast"][fl] * _static_drive(
                c, cols["orientation_deg"][fl], cols["sf_cpd"][fl], cols["phase_deg"][fl], origin), 0.0)
            norm = np.abs(_static_drive(c, np.array([c["theta"] % 180.0] * 4), np.full(4, c["f0"]),
                                        np.arange(4) * 90.0, origin)).max()
            for on, d in ((sn_times, d_sn), (cols["onset_s"][fl], d_fl)):
                b0 = np.round((on + LATENCY_S) / DT).astype(int)
                idx = b0[:, None] + np.arange(evoked)[None, :]
                rate[idx] += (c["gain"] / norm) * np.maximum(d, 0.0)[:, None]
            for row in dr:                 # drifting: drive of the moving grating, rectified
                b0 = int(round((cols["onset_s"][row] + LATENCY_S) / DT))
                nbin = int(round(DRIFT_ON_S / DT))
                ts = (np.arange(nbin) + 0.5) * DT
                ph_c = _static_drive(c, np.array([cols["orientation_deg"][row]]), np.array([cols["sf_cpd"][row]]),
                                     np.array([0.0]), origin)[0]
                ph_s = _static_drive(c, np.array([cols["orientation_deg"][row]]), np.array([cols["sf_cpd"][row]]),
                                     np.array([-90.0]), origin)[0]
                om = 2 * np.pi * DRIFT_TF * ts
                d = ph_c * np.cos(om) + ph_s * np.sin(om)     # cos(a - om) = cos a cos om + sin a sin om
                rate[b0:b0 + nbin] += (c["gain"] / norm) * np.maximum(d, 0.0)
        elif c["kind"] == "untuned":
            for row in np.concatenate([fl, dr]):
                if cols["contrast"][row] <= 0:
                    continue
                b0 = int(round((cols["onset_s"][row] + LATENCY_S) / DT))
                nbin = evoked if static[row] else int(round(DRIFT_ON_S / DT))
                rate[b0:b0 + nbin] += c["gain"]
        counts = rng.poisson(rate * DT)
        bi = np.repeat(np.flatnonzero(counts), counts[counts > 0])
        times.append((bi + rng.random(bi.size)) * DT)
        ids.append(np.full(bi.size, c["id"]))
    t, cell = np.concatenate(times), np.concatenate(ids)
    order = np.argsort(t)
    np.savez(folder / "spikes.npz", time_s=t[order], cell=cell[order])
    manifest = {"sparse_noise": {"frames": "sparse_noise.npy", "times": "sparse_noise_times.npy",
                                 "grid": {"center_deg": list(GRID_CENTER), "spacing_deg": list(GRID_SPACING)}},
                "gratings": {"table": "gratings.csv"},
                "responses": {"kind": "spikes", "file": "spikes.npz"}}
    (folder / "session.json").write_text(json.dumps(manifest, indent=1))


@pytest.fixture(scope="module")
def rows(tmp_path_factory):
    root = tmp_path_factory.mktemp("mouse")
    write_session(root / "session", rng=31)
    out = root / "results"
    assert map2d_main(["analyze", str(root / "session"), "--out", str(out), "--quiet"]) == 0
    with open(out / "cells.csv", newline="") as fh:
        return {int(r["cell"]): r for r in csv.DictReader(fh)}


def _num(s):
    return float(s) if s not in ("", None) else float("nan")


def test_linear_cells_agree_beyond_the_grid_nyquist(rows):
    """Gratings reach 0.32 cpd, 3.2 times the grid's Nyquist frequency (0.1 cpd): the median agreement
    of the linear cells reaches 0.9 (issue 14 acceptance). Measured on this session: 0.98-1.00 (median
    0.99); with the sampled-map prediction this replaced, 0.73-0.81 (median 0.81)."""
    simple = [c["id"] for c in CELLS if c["kind"] == "simple"]
    agr = np.array([_num(rows[i]["agreement"]) for i in simple])
    assert all(rows[i]["responsive"] == "true" for i in simple)
    assert np.median(agr) >= 0.9, agr


def test_untuned_cells_driven_alike_are_never_called_simple(rows):
    untuned = [c["id"] for c in CELLS if c["kind"] in ("untuned", "silent")]
    assert all(rows[i]["grating_class"] != "simple" for i in untuned), \
        [(rows[i]["f1_f0"], rows[i]["f1_f0_ci_low"], rows[i]["grating_class"]) for i in untuned]
    # the untuned cells did respond to the drifting gratings (the test is not vacuous)
    assert all(rows[c["id"]]["grating_responsive"] == "true" for c in CELLS if c["kind"] == "untuned")
