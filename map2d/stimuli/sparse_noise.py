"""Sparse noise: a few bright and dark spots per frame on a grid, seeded and polarity-balanced.

Caution: flashing and high-contrast patterns can trigger seizures in photosensitive people. Follow
local guidance and your local animal-care approvals when presenting these stimuli.
"""

from __future__ import annotations

import numpy as np

from ..contract import SparseNoise
from ..geometry import Grid

__all__ = ["make_sparse_noise", "BALANCE_TOLERANCE"]

#: Largest ``|times bright - times dark|`` of any pixel in a sequence from :func:`make_sparse_noise`
#: (0 when the number of frames is even).
BALANCE_TOLERANCE = 1

_REJECTION_ROUNDS = 12      # cheap redraws of a spot before the exact allowed-set draw
_MAX_RESTARTS = 60          # redraws of whole frames that got stuck before giving up
_CHUNK = 4096               # frames per block in the exact allowed-set draw (memory bound)


def make_sparse_noise(grid: Grid, duration_s: float, rate_hz: float = 20.0, spots_per_frame: int = 4,
                      min_distance_deg: float = 5.0, start_s: float = 0.0, rng=None) -> SparseNoise:
    """Seeded sparse noise: exactly ``spots_per_frame`` bright or dark spots in every frame.

    Caution: flashing and high-contrast patterns can trigger seizures in photosensitive people.
    Follow local guidance and your local animal-care approvals when presenting these stimuli.

    Parameters
    ----------
    grid : Grid
        The stimulus grid (row 0 at the top; see :class:`map2d.geometry.Grid`).
    duration_s : float
        Session length; the sequence has ``floor(duration_s * rate_hz)`` frames (at least 2).
    rate_hz : float
        Frames per second. Frame ``k`` starts at ``start_s + k / rate_hz``.
    spots_per_frame : int
        Spots in every frame (>= 1).
    min_distance_deg : float
        Any two spots of one frame are at least this far apart (Euclidean distance, in degrees,
        between the grid's pixel centres). Spots never share a pixel, even when this is 0.
    start_s : float
        Onset of the first frame.
    rng : numpy.random.Generator or int, optional
        Seed or generator. The same seed gives the same frames, byte for byte.

    Returns
    -------
    SparseNoise
        ``frames`` int8 ``(frames, ny, nx)`` with +1 bright, -1 dark, 0 background; ``times_s`` the
        nominal onsets.

    Raises
    ------
    ValueError
        Naming the argument, for a bad value, or when the grid cannot hold ``spots_per_frame`` spots
        at ``min_distance_deg`` (a greedy scan of the grid fails, or random placement fails too often).

    Notes
    -----
    Positions: in each frame the spots are placed one after another, each uniformly at random among
    the pixels far enough from the spots already placed (a frame that gets stuck is drawn again).
    How often a pixel is used is therefore random, about ``frames * spots_per_frame / (ny * nx)``.

    Polarity balance: half of the frames are drawn as above with random polarities, and each is paired
    with its polarity-inverted twin (same positions, bright <-> dark); all frames are then put in a
    random order, so a frame and its twin appear at unrelated times. Every pixel is therefore shown
    bright exactly as often as dark when the number of frames is even, and within
    ``BALANCE_TOLERANCE = 1`` when it is odd (one twin is left out).

    The work is vectorised over frames (cheap rejection draws, then an exact draw from the allowed
    set for the few frames still waiting); one hour at 60 Hz on a 32 x 32 grid takes seconds.

    Examples
    --------
    >>> g = Grid(ny=8, nx=8, dx_deg=2.0, dy_deg=2.0)
    >>> sn = make_sparse_noise(g, duration_s=10.0, rate_hz=10.0, spots_per_frame=3, rng=1)
    >>> sn.frames.shape, sn.frames.dtype.name
    ((100, 8, 8), 'int8')
    >>> bool(((sn.frames != 0).sum(axis=(1, 2)) == 3).all())
    True
    >>> int(sn.frames.sum(axis=0).max())   # bright minus dark, per pixel
    0
    """
    if not isinstance(grid, Grid):
        raise ValueError(f"grid must be a map2d.geometry.Grid, got {type(grid).__name__}")
    if not (np.isfinite(duration_s) and duration_s > 0):
        raise ValueError(f"duration_s must be positive, got {duration_s}")
    if not (np.isfinite(rate_hz) and rate_hz > 0):
        raise ValueError(f"rate_hz must be positive, got {rate_hz}")
    if int(spots_per_frame) != spots_per_frame or spots_per_frame < 1:
        raise ValueError(f"spots_per_frame must be a positive integer, got {spots_per_frame}")
    if not (np.isfinite(min_distance_deg) and min_distance_deg >= 0):
        raise ValueError(f"min_distance_deg must be >= 0, got {min_distance_deg}")
    if not np.isfinite(start_s):
        raise ValueError(f"start_s must be finite, got {start_s}")
    n_frames = int(np.floor(duration_s * rate_hz + 1e-9))
    if n_frames < 2:
        raise ValueError(f"duration_s * rate_hz gives {n_frames} frames; at least 2 are needed")
    k_spots = int(spots_per_frame)
    rng = np.random.default_rng(rng)

    xm, ym = grid.mesh_deg()
    xs, ys = xm.ravel(), ym.ravel()
    n_pix = xs.size
    if k_spots > n_pix:
        raise ValueError(f"spots_per_frame={k_spots} exceeds the {n_pix} pixels of the grid")
    # "at least min_distance apart": allow rounding error in the pixel positions
    thr2 = float(min_distance_deg) ** 2 * (1.0 - 1e-9)
    greedy = _greedy_capacity(xs, ys, thr2, k_spots)
    if greedy < k_spots:
        raise ValueError(f"spots_per_frame={k_spots} spots cannot be placed at min_distance_deg="
                         f"{min_distance_deg} on this {grid.ny} x {grid.nx} grid (a greedy scan fits "
                         f"only {greedy}); use fewer spots or a smaller min_distance_deg")

    n_base = (n_frames + 1) // 2
    spots = _place_spots(xs, ys, n_base, k_spots, thr2, rng, min_distance_deg)
    pol = (rng.integers(0, 2, size=(n_base, k_spots), dtype=np.int8) * 2 - 1).astype(np.int8)
    all_spots = np.concatenate([spots, spots])
    all_pol = np.concatenate([pol, -pol])
    order = rng.permutation(2 * n_base)[:n_frames]
    frames = np.zeros((n_frames, n_pix), dtype=np.int8)
    frames[np.arange(n_frames)[:, None], all_spots[order]] = all_pol[order]
    frames = frames.reshape(n_frames, grid.ny, grid.nx)
    times = float(start_s) + np.arange(n_frames, dtype=np.float64) / float(rate_hz)
    return SparseNoise(frames=frames, times_s=times, grid=grid)


def _greedy_capacity(xs, ys, thr2, want):
    """Spots a row-major greedy scan fits (stops at ``want``); a lower bound on the true capacity."""
    cx, cy = [], []
    for x, y in zip(xs, ys):
        if cx:
            d2 = (np.asarray(cx) - x) ** 2 + (np.asarray(cy) - y) ** 2
            if np.any(d2 < thr2):
                continue
        cx.append(x)
        cy.append(y)
        if len(cx) >= want:
            break
    return len(cx)


def _conflict(xs, ys, cand, prev, thr2):
    """True where candidate pixel ``cand[m]`` is too close to (or equal to) any of ``prev[m, :]``."""
    if prev.shape[1] == 0:
        return np.zeros(cand.shape, dtype=bool)
    d2 = (xs[prev] - xs[cand][:, None]) ** 2 + (ys[prev] - ys[cand][:, None]) ** 2
    return np.any((d2 < thr2) | (prev == cand[:, None]), axis=1)


def _draw_step(xs, ys, prev, thr2, rng):
    """One more spot for each row of ``prev``: uniform over the allowed pixels, -1 if none is left."""
    m = prev.shape[0]
    n_pix = xs.size
    cand = rng.integers(0, n_pix, size=m)
    todo = np.flatnonzero(_conflict(xs, ys, cand, prev, thr2))
    for _ in range(_REJECTION_ROUNDS):
        if todo.size == 0:
            return cand
        cand[todo] = rng.integers(0, n_pix, size=todo.size)
        todo = todo[_conflict(xs, ys, cand[todo], prev[todo], thr2)]
    # exact draw from the allowed set for the frames still waiting (crowded frames)
    for start in range(0, todo.size, _CHUNK):
        rows = todo[start:start + _CHUNK]
        p = prev[rows]                                             # (r, k)
        d2 = (xs[p][:, :, None] - xs[None, None, :]) ** 2 + (ys[p][:, :, None] - ys[None, None, :]) ** 2
        allowed = ~np.any(d2 < thr2, axis=1)                       # (r, n_pix)
        allowed[np.arange(rows.size)[:, None], p] = False
        keys = rng.random((rows.size, n_pix))
        keys[~allowed] = -1.0
        pick = np.argmax(keys, axis=1)
        pick[~allowed.any(axis=1)] = -1
        cand[rows] = pick
    return cand


def _place_spots(xs, ys, n, k_spots, thr2, rng, min_distance_deg):
    """``(n, k_spots)`` flat pixel indices; spots of a row at least the minimum distance apart."""
    out = np.empty((n, k_spots), dtype=np.int64)
    pending = np.arange(n)
    for _ in range(_MAX_RESTARTS):
        if pending.size == 0:
            return out
        s = np.empty((pending.size, k_spots), dtype=np.int64)
        alive = np.arange(pending.size)
        for k in range(k_spots):
            pick = _draw_step(xs, ys, s[alive, :k], thr2, rng)
            s[alive, k] = pick
            alive = alive[pick >= 0]
        out[pending[alive]] = s[alive]
        done = np.zeros(pending.size, dtype=bool)
        done[alive] = True
        pending = pending[~done]
    if pending.size:
        raise ValueError(f"spots_per_frame={k_spots} spots at min_distance_deg={min_distance_deg} fit this "
                         f"grid too rarely for random placement; use fewer spots or a smaller min_distance_deg")
    return out
