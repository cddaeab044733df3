"""Coordinates and conventions: the one place that knows them.

Every other module takes grid positions, wave vectors and grating images from here, so the
contract's conventions (row 0 at the top, orientation = wave-vector angle counter-clockwise from +x,
phase origin, stimulus formula) are written exactly once.

Conventions (``docs/session-format.md``)
------------------------------------
- ``x`` = azimuth in degrees (positive right), ``y`` = elevation in degrees (positive up).
- A grid of ``ny`` rows and ``nx`` columns; row 0 is the TOP. Pixel ``(i, j)`` has its centre at
  ``x = x0 + (j - (nx - 1) / 2) * dx`` and ``y = y0 - (i - (ny - 1) / 2) * dy``.
- A grating presentation is
  ``s(x, y, t) = contrast * cos(2 pi sf u - 2 pi tf (t - onset) + phase)`` with
  ``u = (x - xc) cos(ori) + (y - yc) sin(ori)``.

Complex response convention (used by gratings, spectral and reconcile)
-----------------------------------------------------------------------
For a spatial kernel ``k(x, y)`` and wave vector ``(kx, ky)`` = :func:`wave_vector` ``(ori, sf)``,

    ``H(kx, ky) = sum_pixels k(x, y) exp(+i 2 pi (kx (x - xc) + ky (y - yc))) dx dy``

(the complex conjugate of the usual forward Fourier transform, referenced to the phase origin). A linear
cell then answers a static grating of phase ``phi`` with ``contrast * Re(H exp(i phi))
= contrast |H| cos(phi + arg H)``, and the first harmonic over phase,
``(2 / P) sum_p r(phi_p) exp(-i phi_p) / contrast``, equals ``H``. Measured complex grating responses are
reported in this convention, so they are directly comparable with ``H`` from the spatial map.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = [
    "Grid",
    "Display",
    "wave_vector",
    "grating_image",
    "fold_orientation_deg",
]


@dataclass(frozen=True)
class Grid:
    """A rectangular stimulus grid in degrees of visual angle.

    Parameters
    ----------
    ny, nx : int
        Rows and columns. Row 0 is the top of the screen.
    center_x_deg, center_y_deg : float
        Azimuth and elevation of the grid centre.
    dx_deg, dy_deg : float
        Spacing between neighbouring pixel centres (both > 0).

    Examples
    --------
    >>> g = Grid(ny=3, nx=4, center_x_deg=10.0, center_y_deg=-5.0, dx_deg=2.0, dy_deg=1.0)
    >>> g.x_deg
    array([ 7.,  9., 11., 13.])
    >>> g.y_deg
    array([-4., -5., -6.])
    """

    ny: int
    nx: int
    center_x_deg: float = 0.0
    center_y_deg: float = 0.0
    dx_deg: float = 1.0
    dy_deg: float = 1.0

    def __post_init__(self):
        if int(self.ny) < 1 or int(self.nx) < 1:
            raise ValueError(f"grid shape must be positive, got ny={self.ny}, nx={self.nx}")
        if not (self.dx_deg > 0 and self.dy_deg > 0):
            raise ValueError(f"grid spacing must be positive, got dx={self.dx_deg}, dy={self.dy_deg}")

    @property
    def shape(self) -> tuple[int, int]:
        return (int(self.ny), int(self.nx))

    @property
    def x_deg(self) -> np.ndarray:
        """Azimuth of each column centre, shape ``(nx,)``."""
        j = np.arange(self.nx, dtype=float)
        return self.center_x_deg + (j - (self.nx - 1) / 2.0) * self.dx_deg

    @property
    def y_deg(self) -> np.ndarray:
        """Elevation of each row centre, shape ``(ny,)``; decreasing, since row 0 is the top."""
        i = np.arange(self.ny, dtype=float)
        return self.center_y_deg - (i - (self.ny - 1) / 2.0) * self.dy_deg

    def mesh_deg(self) -> tuple[np.ndarray, np.ndarray]:
        """``(x, y)`` of every pixel centre, each of shape ``(ny, nx)``."""
        return np.meshgrid(self.x_deg, self.y_deg)

    def pixel_of(self, x_deg, y_deg):
        """Fractional ``(row, col)`` of a point in degrees (inverse of the pixel-centre formula)."""
        col = (np.asarray(x_deg, float) - self.center_x_deg) / self.dx_deg + (self.nx - 1) / 2.0
        row = -(np.asarray(y_deg, float) - self.center_y_deg) / self.dy_deg + (self.ny - 1) / 2.0
        return row, col

    def point_of(self, row, col):
        """``(x_deg, y_deg)`` of a fractional ``(row, col)``."""
        x = self.center_x_deg + (np.asarray(col, float) - (self.nx - 1) / 2.0) * self.dx_deg
        y = self.center_y_deg - (np.asarray(row, float) - (self.ny - 1) / 2.0) * self.dy_deg
        return x, y

    @property
    def extent_deg(self) -> tuple[float, float, float, float]:
        """``(left, right, bottom, top)`` pixel edges, for ``matplotlib.imshow(origin='upper')``."""
        x, y = self.x_deg, self.y_deg
        return (x[0] - self.dx_deg / 2, x[-1] + self.dx_deg / 2,
                y[-1] - self.dy_deg / 2, y[0] + self.dy_deg / 2)

    def to_manifest(self) -> dict:
        return {"center_deg": [float(self.center_x_deg), float(self.center_y_deg)],
                "spacing_deg": [float(self.dx_deg), float(self.dy_deg)]}


def wave_vector(orientation_deg, sf_cpd):
    """Wave vector ``(kx, ky)`` in cycles/deg for the contract's orientation convention.

    ``orientation_deg`` is the angle of the wave vector counter-clockwise from +x (azimuth):
    0 deg is vertical stripes.

    Examples
    --------
    >>> kx, ky = wave_vector(90.0, 0.5)
    >>> round(float(kx), 12), float(ky)
    (0.0, 0.5)
    """
    th = np.deg2rad(np.asarray(orientation_deg, float))
    sf = np.asarray(sf_cpd, float)
    return sf * np.cos(th), sf * np.sin(th)


def grating_image(x_deg, y_deg, orientation_deg, sf_cpd, phase_deg, contrast=1.0,
                  origin_deg=(0.0, 0.0), tf_hz=0.0, t_since_onset_s=0.0):
    """Contrast of a grating at points ``(x_deg, y_deg)`` (contract formula).

    ``s = contrast * cos(2 pi sf u - 2 pi tf t + phase)``, ``u = (x - xc) cos(ori) + (y - yc) sin(ori)``.
    At ``phase = 0`` a bright crest lies on the origin at onset; a drifting grating moves toward ``ori``.

    Examples
    --------
    >>> float(grating_image(0.0, 0.0, 30.0, 0.2, 0.0))
    1.0
    """
    kx, ky = wave_vector(orientation_deg, sf_cpd)
    xc, yc = origin_deg
    arg = (2 * np.pi * (kx * (np.asarray(x_deg, float) - xc) + ky * (np.asarray(y_deg, float) - yc))
           - 2 * np.pi * np.asarray(tf_hz, float) * np.asarray(t_since_onset_s, float)
           + np.deg2rad(np.asarray(phase_deg, float)))
    return np.asarray(contrast, float) * np.cos(arg)


def fold_orientation_deg(angle_deg):
    """Fold an angle into ``[0, 180)``, the range of a preferred orientation.

    Examples
    --------
    >>> fold_orientation_deg([-10.0, 190.0, 180.0])
    array([170.,  10.,   0.])
    """
    return np.mod(np.asarray(angle_deg, float), 180.0)


@dataclass(frozen=True)
class Display:
    """A flat screen viewed from a fixed eye position.

    Parameters
    ----------
    width_cm, height_cm : float
        Visible screen size.
    width_px, height_px : int
        Screen resolution.
    distance_cm : float
        Perpendicular distance from the eye to the screen plane.
    eye_x_cm, eye_y_cm : float
        Foot of the perpendicular from the eye, relative to the screen centre (x right, y up).
        Azimuth 0 / elevation 0 is the direction of that perpendicular.

    Notes
    -----
    Conversion is exact for a flat screen: a point at ``(X, Y)`` cm on the screen (relative to the
    foot of the perpendicular) has azimuth ``atan(X / d)`` and elevation ``atan(Y / sqrt(X^2 + d^2))``
    (the elevation is measured in the vertical plane through the point, so lines of constant azimuth
    are vertical on the screen). The inverse is ``X = d tan(az)``, ``Y = tan(el) sqrt(X^2 + d^2)``.

    Examples
    --------
    >>> d = Display(width_cm=57.3 * 2, height_cm=40, width_px=1920, height_px=1080, distance_cm=57.3)
    >>> round(float(d.cm_to_deg(1.0, 0.0)[0]), 3)
    1.0
    """

    width_cm: float
    height_cm: float
    width_px: int
    height_px: int
    distance_cm: float
    eye_x_cm: float = 0.0
    eye_y_cm: float = 0.0

    def __post_init__(self):
        for name in ("width_cm", "height_cm", "width_px", "height_px", "distance_cm"):
            if not getattr(self, name) > 0:
                raise ValueError(f"display {name} must be positive, got {getattr(self, name)}")

    @property
    def cm_per_px(self) -> tuple[float, float]:
        return self.width_cm / self.width_px, self.height_cm / self.height_px

    def cm_to_deg(self, x_cm, y_cm):
        """Screen point in cm relative to the eye's perpendicular foot -> (azimuth, elevation) deg."""
        x = np.asarray(x_cm, float)
        y = np.asarray(y_cm, float)
        d = self.distance_cm
        az = np.degrees(np.arctan2(x, d))
        el = np.degrees(np.arctan2(y, np.hypot(x, d)))
        return az, el

    def deg_to_cm(self, azimuth_deg, elevation_deg):
        """Inverse of :meth:`cm_to_deg`."""
        d = self.distance_cm
        x = d * np.tan(np.deg2rad(np.asarray(azimuth_deg, float)))
        y = np.tan(np.deg2rad(np.asarray(elevation_deg, float))) * np.hypot(x, d)
        return x, y

    def px_to_deg(self, col_px, row_px):
        """Screen pixel (column, row; row 0 at the top, pixel centres at integer + 0.5 edges) -> degrees."""
        sx, sy = self.cm_per_px
        x_cm = (np.asarray(col_px, float) + 0.5 - self.width_px / 2.0) * sx - self.eye_x_cm
        y_cm = (self.height_px / 2.0 - (np.asarray(row_px, float) + 0.5)) * sy - self.eye_y_cm
        return self.cm_to_deg(x_cm, y_cm)

    def deg_to_px(self, azimuth_deg, elevation_deg):
        """(azimuth, elevation) deg -> fractional screen pixel (column, row)."""
        sx, sy = self.cm_per_px
        x_cm, y_cm = self.deg_to_cm(azimuth_deg, elevation_deg)
        col = (x_cm + self.eye_x_cm) / sx + self.width_px / 2.0 - 0.5
        row = self.height_px / 2.0 - (y_cm + self.eye_y_cm) / sy - 0.5
        return col, row

    def pixel_mesh_deg(self):
        """(azimuth, elevation) of every screen pixel, each ``(height_px, width_px)``."""
        cols = np.arange(self.width_px)
        rows = np.arange(self.height_px)
        cc, rr = np.meshgrid(cols, rows)
        return self.px_to_deg(cc, rr)

    def to_manifest(self) -> dict:
        return {"width_cm": self.width_cm, "height_cm": self.height_cm,
                "width_px": int(self.width_px), "height_px": int(self.height_px),
                "distance_cm": self.distance_cm, "eye_cm": [self.eye_x_cm, self.eye_y_cm]}
