"""Space-time fields: noise-corrected separability, the inseparable call, direction and speed."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest

from map2d.geometry import Grid
from map2d.spacetime import space_time, spiked_power

GRID = Grid(ny=12, nx=16, center_x_deg=0.0, center_y_deg=0.0, dx_deg=2.0, dy_deg=2.0)
FRAME = 0.05
LAGS = np.arange(6) * FRAME


def _maps(z):
    """A minimal map result (the attributes space_time reads) around z-maps (C, L, ny, nx)."""
    C = z.shape[0]
    return SimpleNamespace(grid=GRID, n_cells=C, lags_s=LAGS, frame_s=FRAME, stimulus="sparse",
                           linear_z=z.astype(np.float32), linear=z.astype(np.float32),
                           on_z=np.full_like(z, np.nan), off_z=np.full_like(z, np.nan),
                           on=np.full_like(z, np.nan), off=np.full_like(z, np.nan),
                           responsive=np.ones(C, bool), peak_lag_index=np.full(C, 2))


def _field(theta_deg, f, w_hz, amp):
    """A Gabor at the grid centre (sds 3 deg) with a Gaussian time course (peak 0.1 s, sd 0.04 s), as a
    sparse-noise map sees it: integrated over each pixel (5 x 5 points) and over the frame's triangle in
    time (a one-frame spot, a one-frame response window). With w > 0 the carrier phase advances
    2 pi w tau with the delay, so the stripes drift toward -theta as the lag grows: the field prefers
    motion toward theta at w / f deg/s (DeAngelis et al. 1993)."""
    off = ((np.arange(5) + 0.5) / 5 - 0.5) * GRID.dx_deg
    X = (GRID.x_deg[None, :, None, None] + off[None, None, None, :]) + 0 * GRID.y_deg[:, None, None, None]
    Y = (GRID.y_deg[:, None, None, None] - off[None, None, :, None]) + 0 * GRID.x_deg[None, :, None, None]
    th = np.deg2rad(theta_deg)
    a = X * np.cos(th) + Y * np.sin(th)
    env = np.exp(-(X ** 2 + Y ** 2) / (2 * 3.0 ** 2))
    tau = np.linspace(0.0, LAGS[-1] + FRAME, 301)
    e = np.exp(-(tau - 0.1) ** 2 / (2 * 0.04 ** 2))
    tri = np.maximum(0.0, 1.0 - np.abs(tau[None, :] - LAGS[:, None]) / FRAME)            # (L, tau)
    c_t = (tri * e * np.cos(2 * np.pi * w_hz * tau)).sum(1)
    s_t = (tri * e * np.sin(2 * np.pi * w_hz * tau)).sum(1)
    cos_p = (env * np.cos(2 * np.pi * f * a)).mean(axis=(2, 3))
    sin_p = (env * np.sin(2 * np.pi * f * a)).mean(axis=(2, 3))
    m = c_t[:, None, None] * cos_p[None] - s_t[:, None, None] * sin_p[None]
    return amp * m / np.abs(m).max()


def test_spiked_power_inverts_the_noise_inflation():
    # Benaych-Georges & Nadakuditi (2012): a rank-1 signal of power theta in L x P unit noise has top
    # squared singular value ~ (theta + P)(theta + L) / theta; the inverse recovers theta on average
    rng = np.random.default_rng(0)
    L, P = 6, 80
    u, v = rng.standard_normal(L), rng.standard_normal(P)
    S = np.outer(u / np.linalg.norm(u), v / np.linalg.norm(v)) * np.sqrt(200.0)
    est = [spiked_power(np.linalg.svd(S + rng.standard_normal((L, P)), compute_uv=False)[0] ** 2, L, P)
           for _ in range(200)]
    assert np.mean(est) == pytest.approx(200.0, rel=0.05)
    assert np.isnan(spiked_power(10.0, L, P))                                  # below the noise edge


@pytest.mark.parametrize("peak_z", [6.0, 12.0, 30.0])
def test_separable_maps_read_near_1_at_any_snr(peak_z):
    rng = np.random.default_rng(1)
    n = 40
    z = _field(30.0, 0.12, 0.0, peak_z)[None] + rng.standard_normal((n, LAGS.size, GRID.ny, GRID.nx))
    st = space_time(_maps(z), np.full(n, "linear"), np.zeros((n, 2)), np.full(n, 3.0))
    sep = st.separability
    assert np.median(sep) > 0.9
    # the uncorrected share S1^2 / sum S^2 of the same maps falls with the SNR (so the correction matters)
    raw = []
    for c in range(n):
        s = np.linalg.svd(z[c].reshape(LAGS.size, -1), compute_uv=False)
        raw.append(s[0] ** 2 / np.sum(s ** 2))
    if peak_z <= 12:
        assert np.median(raw) < 0.6
    # the inseparable call is a test at level 0.01 (here <= 3 of 40 false calls allowed)
    assert st.inseparable.sum() <= 3
    assert np.all(np.isnan(st.direction_deg[~st.inseparable]))


@pytest.mark.parametrize("theta,f,w", [(30.0, 0.12, 6.0), (200.0, 0.1, 4.0), (300.0, 0.15, 5.0)])
def test_tilted_maps_give_direction_and_speed(theta, f, w):
    rng = np.random.default_rng(2)
    n = 10
    z = _field(theta, f, w, 12.0)[None] + rng.standard_normal((n, LAGS.size, GRID.ny, GRID.nx))
    st = space_time(_maps(z), np.full(n, "linear"), np.zeros((n, 2)), np.full(n, 3.0))
    assert st.inseparable.all()
    # noise-corrected: the estimate tracks the noiseless map's share S1^2 / sum S^2
    sv = np.linalg.svd(_field(theta, f, w, 12.0).reshape(LAGS.size, -1), compute_uv=False)
    truth = sv[0] ** 2 / np.sum(sv ** 2)
    assert truth < 0.8
    assert np.median(st.separability) == pytest.approx(truth, abs=0.08)
    err = np.abs((st.direction_deg - theta + 180.0) % 360.0 - 180.0)
    assert np.all(err <= 15.0), st.direction_deg
    # a map sampled at 20 Hz over 6 lags resolves speed to ~20-30 %
    assert np.median(st.speed_deg_s) == pytest.approx(w / f, rel=0.35)
    assert np.all(st.dsi > 0.3)
    # the slice across the stripes is tilted: its peak moves with the lag (toward -theta)
    sl = st.slice_across[0]
    pos = st.slice_positions_deg
    com = [np.sum(pos * np.clip(s, 0, None)) / np.sum(np.clip(s, 0, None)) for s in sl[1:5]]
    assert not np.allclose(com, com[0], atol=0.5)
