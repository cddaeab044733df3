"""Held-out check of the space-time analysis on sessions written from the session format alone.

The generator below imports nothing from map2d: it writes ``session.json``, ``sparse_noise.npy``,
``sparse_noise_times.npy``, ``gratings.csv`` and ``spikes.npz`` itself. Every model cell is a
half-wave rectified linear cell (a simple cell) with a space-time kernel

    ``k(x, y, tau) = env(a, b) e(tau) cos(2 pi f a + 2 pi w tau + psi)``,

``a`` along the carrier's wave vector (angle ``theta``, counter-clockwise from +x), ``b`` across it,
``env`` a Gaussian envelope, ``e`` a Gaussian in time. With ``w = 0`` the kernel is space-time
separable; with ``w > 0`` its stripes drift toward ``-a`` as the lag grows (a tilted, direction-selective
field; DeAngelis, Ohzawa & Freeman 1993): the cell prefers motion toward ``theta`` at ``w / f`` deg/s
(the drifting grating ``cos(2 pi f u - 2 pi tf t + phase)`` of the session format, moving toward its
``orientation_deg``, matches the kernel at ``tf = w``). Stimuli are projected on the kernel's two
spatial parts (cosine and sine carrier; sparse-noise spots integrated over their pixel, gratings
over a fine grid) and convolved with their time courses in 5-ms bins; spikes are Poisson.

The analysis runs through the command line (``map2d analyze SESSION --out DIR``); results are read from
``cells.csv``. Acceptance of the space-time work: ``st_separability`` separates the tilted from the
separable cells, ``st_direction_deg`` is within 30 deg of the true direction for the tilted ones, and
those are placed and called linear like the separable simple cells.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest

from map2d.cli import main as map2d_main

GRID_CENTER = (5.0, -3.0)
GRID_SPACING = (2.0, 2.0)
GRID_SHAPE = (12, 16)                 # ny, nx
SN_RATE, SN_SPOTS, SN_MINUTES = 20.0, 4, 10.0
FL_RATE, FL_MINUTES = 10.0, 4.0
FL_ORIS = np.arange(12) * 15.0
FL_SFS = np.array([0.05, 0.08, 0.12, 0.18])
FL_PHASES = np.array([0.0, 90.0, 180.0, 270.0])
DR_DIRS = np.arange(8) * 45.0
DR_SFS = np.array([0.08, 0.12])
DR_TF, DR_ON, DR_OFF, DR_REPEATS = 4.0, 2.0, 1.0, 3
DT = 0.005
TAU = np.arange(0.0, 0.3, DT) + DT / 2           # kernel lags (bin centres)

CELLS = [
    # id, centre, theta (deg), f (cpd), w (Hz), psi (deg); tilted cells have w > 0
    dict(id=1, cx=-2.0, cy=2.0, theta=30.0, f=0.10, w=6.0, psi=20.0),
    dict(id=2, cx=10.0, cy=-8.0, theta=200.0, f=0.12, w=6.0, psi=-60.0),
    dict(id=3, cx=14.0, cy=1.0, theta=300.0, f=0.09, w=6.0, psi=100.0),
    dict(id=4, cx=0.0, cy=-9.0, theta=70.0, f=0.10, w=0.0, psi=0.0),
    dict(id=5, cx=6.0, cy=0.0, theta=120.0, f=0.12, w=0.0, psi=90.0),
    dict(id=6, cx=16.0, cy=-6.0, theta=0.0, f=0.09, w=0.0, psi=200.0),
]
SIGMA_A, SIGMA_B = 3.0, 3.5          # envelope sds across / along the stripes (deg)
T_PEAK, T_SD = 0.10, 0.04            # time course e(tau)
GAIN, BASE = 150.0, 1.0              # spikes/s above baseline at the optimal drifting grating
TILTED_GAIN = 250.0                  # tilted cells: a spot's response spreads over lags whose phases
                                     # differ, so the same gain gives a weaker map; this evens the maps' SNR


def pixel_centres():
    ny, nx = GRID_SHAPE
    x = GRID_CENTER[0] + (np.arange(nx) - (nx - 1) / 2) * GRID_SPACING[0]
    y = GRID_CENTER[1] - (np.arange(ny) - (ny - 1) / 2) * GRID_SPACING[1]      # row 0 at the top
    return x, y


def spatial_parts(c, x, y):
    """Cosine and sine carrier parts of the kernel at points (x, y)."""
    th = np.deg2rad(c["theta"])
    a = (x - c["cx"]) * np.cos(th) + (y - c["cy"]) * np.sin(th)
    b = -(x - c["cx"]) * np.sin(th) + (y - c["cy"]) * np.cos(th)
    env = np.exp(-a ** 2 / (2 * SIGMA_A ** 2) - b ** 2 / (2 * SIGMA_B ** 2))
    return env * np.cos(2 * np.pi * c["f"] * a), env * np.sin(2 * np.pi * c["f"] * a)


def time_courses(c):
    """h_C, h_S (per 5-ms bin) so that drive = h_C * x_C - h_S * x_S (x = stimulus on each part)."""
    e = np.exp(-(TAU - T_PEAK) ** 2 / (2 * T_SD ** 2)) * DT
    ph = 2 * np.pi * c["w"] * TAU + np.deg2rad(c["psi"])
    return e * np.cos(ph), e * np.sin(ph)


def pixel_parts(c):
    """Both parts integrated over each grid pixel (5 x 5 midpoint rule), (2, P) in row-major order."""
    x, y = pixel_centres()
    s = (np.arange(5) + 0.5) / 5 - 0.5
    X = (x[None, :, None, None] + s[None, None, None, :] * GRID_SPACING[0]) + 0 * y[:, None, None, None]
    Y = (y[:, None, None, None] - s[None, None, :, None] * GRID_SPACING[1]) + 0 * x[None, :, None, None]
    pc, ps = spatial_parts(c, X, Y)
    area = GRID_SPACING[0] * GRID_SPACING[1] / 25
    return np.stack([pc.sum(axis=(2, 3)).ravel(), ps.sum(axis=(2, 3)).ravel()]) * area


def patch(c):
    v = np.arange(-4.5 * SIGMA_B, 4.5 * SIGMA_B + 0.1, 0.25)
    x, y = np.meshgrid(c["cx"] + v, c["cy"] + v)
    return x, y, 0.25 * 0.25


def grating_amplitudes(c, ori, sf, origin):
    """``Z = sum part(x) exp(i 2 pi sf u) dA`` for both parts (contract: u from the phase origin)."""
    x, y, da = patch(c)
    pc, ps = spatial_parts(c, x, y)
    pairs, inv = np.unique(np.column_stack([np.ravel(ori), np.ravel(sf)]), axis=0, return_inverse=True)
    out = np.empty((2, len(pairs)), complex)
    for i, (o, f) in enumerate(pairs):
        th = np.deg2rad(o)
        e = np.exp(2j * np.pi * f * ((x - origin[0]) * np.cos(th) + (y - origin[1]) * np.sin(th)))
        out[0, i], out[1, i] = np.sum(pc * e) * da, np.sum(ps * e) * da
    return out[:, np.ravel(inv)]


def write_session(folder: Path, seed: int = 0) -> None:
    rng = np.random.default_rng(seed)
    folder.mkdir(parents=True)
    ny, nx = GRID_SHAPE
    P = ny * nx
    # sparse noise: SN_SPOTS distinct pixels per frame, random polarity
    n_sn = int(SN_MINUTES * 60 * SN_RATE)
    frames = np.zeros((n_sn, P), np.int8)
    pix = np.argsort(rng.random((n_sn, P)), axis=1)[:, :SN_SPOTS]
    frames[np.arange(n_sn)[:, None], pix] = rng.choice(np.array([-1, 1], np.int8), (n_sn, SN_SPOTS))
    t_sn = 1.0 + np.arange(n_sn) / SN_RATE
    np.save(folder / "sparse_noise.npy", frames.reshape(n_sn, ny, nx))
    np.save(folder / "sparse_noise_times.npy", t_sn)
    # flashed gratings, then drifting trials
    t0 = t_sn[-1] + 1 / SN_RATE + 2.0
    n_fl = int(FL_MINUTES * 60 * FL_RATE)
    fl = dict(onset_s=t0 + np.arange(n_fl) / FL_RATE, orientation_deg=rng.choice(FL_ORIS, n_fl),
              sf_cpd=rng.choice(FL_SFS, n_fl), phase_deg=rng.choice(FL_PHASES, n_fl),
              contrast=np.ones(n_fl), tf_hz=np.zeros(n_fl))
    fl["offset_s"] = fl["onset_s"] + 1 / FL_RATE
    t1 = fl["offset_s"][-1] + 2.0
    conds = [(d, s) for d in DR_DIRS for s in DR_SFS] * DR_REPEATS
    order = rng.permutation(len(conds))
    n_dr = len(conds)
    on = t1 + np.arange(n_dr) * (DR_ON + DR_OFF)
    dr = dict(onset_s=on, offset_s=on + DR_ON, orientation_deg=np.array([conds[i][0] for i in order]),
              sf_cpd=np.array([conds[i][1] for i in order]), phase_deg=rng.choice(FL_PHASES, n_dr),
              contrast=np.ones(n_dr), tf_hz=np.full(n_dr, DR_TF))
    names = ["onset_s", "offset_s", "orientation_deg", "sf_cpd", "phase_deg", "contrast", "tf_hz"]
    with open(folder / "gratings.csv", "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(names)
        for part in (fl, dr):
            for i in range(part["onset_s"].size):
                w.writerow([repr(round(float(part[k][i]), 6)) for k in names])
    t_end = on[-1] + DR_ON + 1.0
    nb = int(np.ceil(t_end / DT))
    tb = (np.arange(nb) + 0.5) * DT
    origin = GRID_CENTER                                     # no phase_origin_deg: the grid centre
    times, ids = [], []
    for c in CELLS:
        x_parts = np.zeros((2, nb))
        # sparse noise: each frame's projection on the two parts, held for the frame
        proj = frames.astype(float) @ pixel_parts(c).T       # (F, 2)
        b0 = np.floor(t_sn / DT + 1e-9).astype(int)
        per = int(round(1 / SN_RATE / DT))
        idx = b0[:, None] + np.arange(per)[None, :]
        x_parts[:, idx] = proj.T[:, :, None]
        # flashed: static projections held for the presentation
        z = grating_amplitudes(c, fl["orientation_deg"], fl["sf_cpd"], origin)
        val = np.real(z * np.exp(1j * np.deg2rad(fl["phase_deg"])))[...] * fl["contrast"]
        b0 = np.floor(fl["onset_s"] / DT + 1e-9).astype(int)
        per = int(round(1 / FL_RATE / DT))
        idx = b0[:, None] + np.arange(per)[None, :]
        x_parts[:, idx] = val[:, :, None]
        # drifting: s = cos(2 pi sf u - 2 pi tf (t - onset) + phase) -> Re(Z exp(i phase - i 2 pi tf (t - onset)))
        z = grating_amplitudes(c, dr["orientation_deg"], dr["sf_cpd"], origin)
        per = int(round(DR_ON / DT))
        for i in range(n_dr):
            b = int(np.floor(dr["onset_s"][i] / DT + 1e-9)) + np.arange(per)
            ph = np.deg2rad(dr["phase_deg"][i]) - 2 * np.pi * DR_TF * (tb[b] - dr["onset_s"][i])
            x_parts[:, b] = np.real(z[:, i:i + 1] * np.exp(1j * ph)[None, :])
        hc, hs = time_courses(c)
        drive = np.convolve(x_parts[0], hc)[:nb] - np.convolve(x_parts[1], hs)[:nb]
        # gain: the optimal drifting grating (direction theta, sf f, tf w or DR_TF) peaks at GAIN
        zb = grating_amplitudes(c, [c["theta"]], [c["f"]], (c["cx"], c["cy"]))[:, 0]
        tf = c["w"] if c["w"] > 0 else DR_TF
        tt = np.arange(0, 2.0, DT)
        xb = np.real(zb[:, None] * np.exp(-2j * np.pi * tf * tt)[None, :])
        peak = np.max((np.convolve(xb[0], hc) - np.convolve(xb[1], hs))[TAU.size:tt.size])
        rate = BASE + (TILTED_GAIN if c["w"] > 0 else GAIN) * np.maximum(drive, 0.0) / peak
        n = rng.poisson(rate * DT)
        bi = np.repeat(np.arange(nb), n)
        times.append((bi + rng.random(bi.size)) * DT)
        ids.append(np.full(bi.size, c["id"]))
    t = np.concatenate(times)
    cid = np.concatenate(ids)
    o = np.argsort(t, kind="stable")
    np.savez(folder / "spikes.npz", time_s=t[o], cell=cid[o])
    manifest = {"sparse_noise": {"frames": "sparse_noise.npy", "times": "sparse_noise_times.npy",
                                 "grid": {"center_deg": list(GRID_CENTER), "spacing_deg": list(GRID_SPACING)}},
                "gratings": {"table": "gratings.csv"},
                "responses": {"kind": "spikes", "file": "spikes.npz"}}
    (folder / "session.json").write_text(json.dumps(manifest, indent=1))


def read_cells(path):
    with open(path, newline="") as fh:
        return {int(r["cell"]): r for r in csv.DictReader(fh)}


def _f(v):
    return float(v) if v not in ("", None) else float("nan")


@pytest.fixture(scope="module")
def analysed(tmp_path_factory):
    base = tmp_path_factory.mktemp("spacetime")
    write_session(base / "session", seed=4)
    assert map2d_main(["analyze", str(base / "session"), "--out", str(base / "out"), "--quiet",
                       "--max-lag", "0.25"]) == 0
    return read_cells(base / "out" / "cells.csv")


def _angle_diff(a, b):
    return abs((a - b + 180.0) % 360.0 - 180.0)


def test_separability_separates_tilted_from_separable_cells(analysed):
    tilted = [_f(analysed[c["id"]]["st_separability"]) for c in CELLS if c["w"] > 0]
    separable = [_f(analysed[c["id"]]["st_separability"]) for c in CELLS if c["w"] == 0]
    assert np.all(np.isfinite(tilted)) and np.all(np.isfinite(separable))
    assert max(tilted) < min(separable)
    assert min(separable) > 0.85


def test_direction_of_tilted_cells_within_30_deg(analysed):
    for c in CELLS:
        if c["w"] > 0:
            row = analysed[c["id"]]
            assert _angle_diff(_f(row["st_direction_deg"]), c["theta"]) < 30.0, (c["id"], row["st_direction_deg"])
            assert _f(row["st_speed_deg_s"]) == pytest.approx(c["w"] / c["f"], rel=0.5)


def test_tilted_cells_placed_and_called_linear_like_separable_ones(analysed):
    for c in CELLS:
        row = analysed[c["id"]]
        assert row["responsive"] == "true"
        err = np.hypot(_f(row["center_x_deg"]) - c["cx"], _f(row["center_y_deg"]) - c["cy"])
        assert err < 1.5, (c["id"], err)
        assert row["linear"] == "true", (c["id"], row["agreement"], row["linear_reason"])


def test_map_direction_agrees_with_the_drifting_gratings(analysed):
    """Where both exist, the map's direction and direction index agree with the drifting gratings'."""
    for c in CELLS:
        row = analysed[c["id"]]
        if c["w"] > 0:
            assert _f(row["st_direction_diff_deg"]) < 30.0
            assert _f(row["dsi"]) > 0.5 and _f(row["st_dsi"]) > 0.5
        else:
            assert np.isnan(_f(row["st_direction_diff_deg"]))      # no direction for a separable map
            assert _f(row["dsi"]) < 0.3 and abs(_f(row["st_dsi"])) < 0.2
