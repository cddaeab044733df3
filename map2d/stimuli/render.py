"""Render stimuli at display resolution (exact flat-screen geometry) as uint8 frames.

Every screen pixel's direction ``(azimuth, elevation)`` comes from :class:`map2d.geometry.Display`
(``atan`` geometry of a flat screen seen from the eye), so a grid cell or a grating is drawn where it lies
in visual space, not where a linear cm-to-degree rule would put it. Grey background 128; sparse noise
+1 -> 255, -1 -> 0; gratings ``round(128 + 127 s)``.

Caution: flashing and high-contrast patterns can trigger seizures in photosensitive people. Follow
local guidance and your local animal-care approvals when presenting these stimuli.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..contract import GratingTable, SparseNoise
from ..geometry import Display, Grid, grating_image

__all__ = ["screen_mesh_deg", "grid_lookup", "render_sparse_noise", "grating_frame_times",
           "render_gratings", "write_frames_tiff", "FRAMES_FILE", "GREY"]

FRAMES_FILE = "frames.tif"
GREY = 128


def screen_mesh_deg(display: Display, scale: int = 1):
    """``(azimuth, elevation)`` of every ``scale``-th screen pixel (rows and columns), each ``(h, w)``.

    With ``scale = s`` the rendered pixel ``(r, c)`` is screen pixel ``(s r, s c)``.
    """
    if int(scale) != scale or scale < 1:
        raise ValueError(f"scale must be a positive integer, got {scale}")
    cols = np.arange(0, int(display.width_px), int(scale))
    rows = np.arange(0, int(display.height_px), int(scale))
    cc, rr = np.meshgrid(cols, rows)
    return display.px_to_deg(cc, rr)


def grid_lookup(grid: Grid, display: Display, scale: int = 1) -> np.ndarray:
    """Flat grid-cell index (``row * nx + col``) under every rendered screen pixel, -1 outside the grid.

    A cell covers ``[x - dx/2, x + dx/2) x (y - dy/2, y + dy/2]`` in degrees around its centre.
    """
    az, el = screen_mesh_deg(display, scale)
    row, col = grid.pixel_of(az, el)
    r = np.floor(row + 0.5).astype(np.int64)
    c = np.floor(col + 0.5).astype(np.int64)
    inside = (r >= 0) & (r < grid.ny) & (c >= 0) & (c < grid.nx)
    return np.where(inside, r * grid.nx + c, -1)


def _frame_indices(n_total, frames):
    if frames is None:
        idx = np.arange(n_total)
    elif isinstance(frames, slice):
        idx = np.arange(n_total)[frames]
    else:
        idx = np.atleast_1d(np.asarray(frames, dtype=np.int64))
    if idx.size and (idx.min() < 0 or idx.max() >= n_total):
        raise ValueError(f"frames must lie in 0..{n_total - 1}")
    return idx


def render_sparse_noise(sparse_noise: SparseNoise, display: Display, frames=None, scale: int = 1) -> np.ndarray:
    """Sparse-noise frames as seen on the screen.

    Caution: flashing and high-contrast patterns can trigger seizures in photosensitive people.

    Parameters
    ----------
    sparse_noise : SparseNoise
    display : Display
    frames : slice, sequence of int or None
        Which stimulus frames to render (all when None; a long session is large, so choose a range).
    scale : int
        Render every ``scale``-th screen pixel in each direction.

    Returns
    -------
    numpy.ndarray
        uint8 ``(n, h, w)``: 255 bright, 0 dark, 128 background and outside the grid.
    """
    idx = _frame_indices(sparse_noise.n_frames, frames)
    lut_cell = grid_lookup(sparse_noise.grid, display, scale)
    inside = lut_cell >= 0
    values = np.array([0, GREY, 255], dtype=np.uint8)         # index = value + 1
    flat = np.asarray(sparse_noise.frames[idx]).reshape(idx.size, -1)
    if not np.issubdtype(flat.dtype, np.integer) or np.any(np.abs(flat) > 1):
        raise ValueError("render_sparse_noise needs frames of -1, 0 and +1")
    out = np.full((idx.size,) + lut_cell.shape, GREY, dtype=np.uint8)
    cells = lut_cell[inside]
    for n in range(idx.size):               # one vectorised lookup per rendered frame
        out[n][inside] = values[flat[n, cells].astype(np.int64) + 1]
    return out


def grating_frame_times(table: GratingTable, rate_hz: float = 60.0) -> np.ndarray:
    """Times at which to render a grating table: each static row's onset, and drifting rows at ``rate_hz``.

    Gaps between presentations (grey) are not rendered.
    """
    if not (np.isfinite(rate_hz) and rate_hz > 0):
        raise ValueError(f"rate_hz must be positive, got {rate_hz}")
    parts = []
    for on, off, tf in zip(table.onset_s, table.offset_s, table.tf_hz):
        if tf == 0:
            parts.append(np.array([on]))
        else:
            n = int(np.ceil((off - on) * rate_hz - 1e-9))
            parts.append(on + np.arange(n) / rate_hz)
    return np.concatenate(parts) if parts else np.empty(0)


def render_gratings(table: GratingTable, display: Display, times_s, scale: int = 1, aperture_deg=None) -> np.ndarray:
    """Grating frames as seen on the screen at the given times.

    Caution: flashing and high-contrast patterns can trigger seizures in photosensitive people.

    At time ``t`` the presentation shown is the latest one with ``onset <= t < offset``; when none is,
    the frame is grey. The pixel value is ``round(128 + 127 s)`` with ``s`` the contract's formula
    (:func:`map2d.geometry.grating_image`), evaluated at each screen pixel's exact direction.
    ``aperture_deg = (x, y, diameter)`` shows the gratings only inside that circle (grey outside).

    Returns
    -------
    numpy.ndarray
        uint8 ``(len(times_s), h, w)``.
    """
    t = np.atleast_1d(np.asarray(times_s, dtype=float))
    az, el = screen_mesh_deg(display, scale)
    out = np.full((t.size,) + az.shape, GREY, dtype=np.uint8)
    inside = None
    if aperture_deg is not None:
        ax, ay, ad = (float(v) for v in aperture_deg)
        if not (np.isfinite([ax, ay, ad]).all() and ad > 0):
            raise ValueError(f"aperture_deg must be (x, y, diameter > 0), got {tuple(aperture_deg)}")
        inside = np.hypot(az - ax, el - ay) <= ad / 2
    on = np.asarray(table.onset_s, float)
    off = np.asarray(table.offset_s, float)
    for n, tn in enumerate(t):
        active = np.flatnonzero((on <= tn) & (tn < off))
        row = int(active[np.argmax(on[active])]) if active.size else None
        if row is None:
            continue
        s = grating_image(az, el, table.orientation_deg[row], table.sf_cpd[row], table.phase_deg[row],
                          contrast=table.contrast[row], origin_deg=table.phase_origin_deg,
                          tf_hz=table.tf_hz[row], t_since_onset_s=tn - on[row])
        frame = np.clip(np.rint(GREY + 127.0 * s), 0, 255).astype(np.uint8)
        out[n] = frame if inside is None else np.where(inside, frame, np.uint8(GREY))
    return out


def write_frames_tiff(folder, frames: np.ndarray, name: str = FRAMES_FILE, rate_hz: float | None = None,
                      display: Display | None = None, scale: int = 1, times_s=None) -> Path:
    """Write rendered frames as a uint8 ImageJ TIFF stack ``folder/frames.tif`` (one page per frame).

    With ``rate_hz`` the stack's frame interval (ImageJ ``finterval``, seconds) is ``1 / rate_hz``; with
    ``display`` the pixel size is the degrees per rendered pixel at the screen centre (unit ``deg``;
    flat-screen geometry makes it smaller towards the edges). The page description also holds, as
    ImageJ properties, ``frame_rate_hz``, ``deg_per_px_x`` and ``deg_per_px_y`` at the centre,
    ``render_scale`` and the first frame's onset ``first_onset_s``.
    """
    import tifffile

    path = Path(folder) / name
    frames = np.ascontiguousarray(frames, dtype=np.uint8)
    metadata: dict = {"axes": "TYX"}
    props: dict = {"render_scale": str(int(scale))}
    kwargs: dict = {}
    if rate_hz is not None and rate_hz > 0:
        metadata["finterval"] = 1.0 / float(rate_hz)
        props["frame_rate_hz"] = f"{float(rate_hz):.9g}"
    if display is not None:
        cx, cy = display.width_px / 2.0, display.height_px / 2.0
        x0, y0 = display.px_to_deg(cx - 0.5, cy - 0.5)
        x1, _ = display.px_to_deg(cx + 0.5, cy - 0.5)
        _, y1 = display.px_to_deg(cx - 0.5, cy + 0.5)
        dx, dy = abs(float(x1 - x0)) * scale, abs(float(y1 - y0)) * scale
        kwargs["resolution"] = (1.0 / dx, 1.0 / dy)
        metadata["unit"] = "deg"
        props["deg_per_px_x"], props["deg_per_px_y"] = f"{dx:.9g}", f"{dy:.9g}"
    if times_s is not None and len(times_s):
        props["first_onset_s"] = f"{float(times_s[0]):.9g}"
    metadata["Properties"] = props
    tifffile.imwrite(path, frames, imagej=True, metadata=metadata, **kwargs)
    return path
