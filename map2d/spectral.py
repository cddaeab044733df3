"""Two-dimensional Fourier sums at arbitrary wave vectors.

The sums follow the complex-response convention of :mod:`map2d.geometry`:

    ``H(kx, ky) = sum_pixels k(x, y) exp(+i 2 pi (kx (x - xc) + ky (y - yc))) dx dy``

with ``(x, y)`` the grid's true pixel centres (row 0 at the top, ``y`` decreasing down the rows) and
``(xc, yc)`` the phase origin. A linear cell with spatial kernel ``k`` then answers a static grating of
orientation ``ori``, spatial frequency ``sf``, phase ``phi`` and contrast ``c`` with
``c Re(H exp(i phi))``.

The exponential factorises into a row factor ``exp(i 2 pi ky (y - yc))`` and a column factor
``exp(i 2 pi kx (x - xc))``, so the sum for ``C`` maps and ``K`` wave vectors is two small matrix
products (``(C ny, nx) @ (nx, K)`` then a contraction over rows) and never builds a ``(K, ny, nx)``
stack of grating images.

References
----------
Bracewell RN (2000) The Fourier Transform and Its Applications, 3rd ed. McGraw-Hill (2-D transform,
Gaussian pair, polar coordinates in the frequency plane).
"""

from __future__ import annotations

import numpy as np

from .geometry import Grid, wave_vector

__all__ = ["fourier_at", "inverse_fourier", "grating_basis", "polar_area_weights", "orientation_period",
           "gaussian_spectrum", "dog_spectrum_at", "gabor_spectrum", "nyquist_mask"]

#: Largest number of complex elements in one intermediate ``(C, ny, chunk)`` block.
_BLOCK_ELEMENTS = 4_000_000


def _origin(grid: Grid, origin_deg):
    if origin_deg is None:
        return float(grid.center_x_deg), float(grid.center_y_deg)
    o = np.asarray(origin_deg, float).ravel()
    if o.size != 2 or not np.all(np.isfinite(o)):
        raise ValueError(f"origin_deg must be two finite numbers (x, y), got {origin_deg!r}")
    return float(o[0]), float(o[1])


def _wave_vectors(orientation_deg, sf_cpd):
    ori, sf = np.broadcast_arrays(np.asarray(orientation_deg, float), np.asarray(sf_cpd, float))
    if not (np.all(np.isfinite(ori)) and np.all(np.isfinite(sf))):
        raise ValueError("orientation_deg and sf_cpd must be finite")
    kx, ky = wave_vector(ori.ravel(), sf.ravel())
    return ori.shape, np.asarray(kx, float), np.asarray(ky, float)


def _factors(grid: Grid, kx, ky, origin):
    """Column factor ``(nx, K)`` and row factor ``(ny, K)`` of ``exp(+i 2 pi k . (x - xc))``."""
    xc, yc = origin
    ex = np.exp(2j * np.pi * np.outer(grid.x_deg - xc, kx))
    ey = np.exp(2j * np.pi * np.outer(grid.y_deg - yc, ky))
    return ex, ey


def _check_maps(maps, grid: Grid, name="maps"):
    m = np.asarray(maps)
    if m.ndim < 2 or m.shape[-2:] != grid.shape:
        raise ValueError(f"{name} must have shape (..., {grid.ny}, {grid.nx}) to match the grid, "
                         f"got {m.shape}")
    if not (np.issubdtype(m.dtype, np.floating) or np.issubdtype(m.dtype, np.complexfloating)
            or np.issubdtype(m.dtype, np.integer) or m.dtype == bool):
        raise ValueError(f"{name} must be numeric, got dtype {m.dtype}")
    if not np.issubdtype(m.dtype, np.complexfloating):
        m = m.astype(float, copy=False)
    return m


def fourier_at(maps, grid: Grid, orientation_deg, sf_cpd, origin_deg=None):
    """Exact 2-D Fourier sum of spatial maps at arbitrary wave vectors.

    Parameters
    ----------
    maps : array_like, shape (..., ny, nx)
        Spatial maps on ``grid`` (row 0 at the top).
    grid : Grid
        The stimulus grid; its true pixel centres ``grid.x_deg``, ``grid.y_deg`` are used.
    orientation_deg, sf_cpd : array_like
        Wave vectors in the contract convention (orientation = wave-vector angle counter-clockwise from
        +x; SF in cycles/deg). Broadcast together to a shape ``W``: pass two 1-D arrays of length ``K``
        for ``K`` wave vectors, or ``ori[:, None]`` and ``sf[None, :]`` for an orientation x SF grid.
    origin_deg : (float, float), optional
        Phase origin ``(xc, yc)``; default the grid centre (the contract's default).

    Returns
    -------
    numpy.ndarray, complex, shape (..., *W)
        ``H = sum k(x, y) exp(+i 2 pi (kx (x - xc) + ky (y - yc))) dx dy``. NaN in a map propagates to
        that map's values.

    Examples
    --------
    >>> g = Grid(ny=1, nx=1, center_x_deg=0.0, center_y_deg=0.0, dx_deg=0.5, dy_deg=2.0)
    >>> h = fourier_at(np.ones((1, 1)), g, 0.0, 0.25, origin_deg=(-1.0, 0.0))
    >>> complex(np.round(h, 12))   # one pixel 1 deg right of the origin: a quarter cycle, area 1
    1j
    """
    grid_ = grid
    m = _check_maps(maps, grid_)
    origin = _origin(grid_, origin_deg)
    wshape, kx, ky = _wave_vectors(orientation_deg, sf_cpd)
    lead = m.shape[:-2]
    ny, nx = grid_.shape
    flat = m.reshape(-1, ny, nx)
    n_maps, n_k = flat.shape[0], kx.size
    out = np.empty((n_maps, n_k), complex)
    area = float(grid_.dx_deg) * float(grid_.dy_deg)
    chunk = max(1, _BLOCK_ELEMENTS // max(1, n_maps * ny))
    rows = flat.reshape(n_maps * ny, nx)
    for k0 in range(0, n_k, chunk):
        sl = slice(k0, min(n_k, k0 + chunk))
        ex, ey = _factors(grid_, kx[sl], ky[sl], origin)
        if np.iscomplexobj(rows):
            a = rows @ ex
        else:  # two real products are cheaper than one complex product with a real left side
            a = (rows @ ex.real) + 1j * (rows @ ex.imag)
        a = a.reshape(n_maps, ny, -1)                           # (C, ny, k): summed over x
        out[:, sl] = np.einsum("cik,ik->ck", a, ey) * area      # summed over y
    return out.reshape(lead + wshape)


def inverse_fourier(coefficients, grid: Grid, orientation_deg, sf_cpd, origin_deg=None):
    """Sum of complex exponentials on the grid: the adjoint of :func:`fourier_at` without the area.

    Parameters
    ----------
    coefficients : array_like, complex, shape (..., *W)
        One complex coefficient ``a`` per wave vector; ``W`` is the broadcast shape of the wave vectors.
    grid, orientation_deg, sf_cpd, origin_deg
        As in :func:`fourier_at`.

    Returns
    -------
    numpy.ndarray, complex, shape (..., ny, nx)
        ``sum_k a_k exp(-i 2 pi (kx_k (x - xc) + ky_k (y - yc)))`` at every pixel centre.
    """
    origin = _origin(grid, origin_deg)
    wshape, kx, ky = _wave_vectors(orientation_deg, sf_cpd)
    a = np.asarray(coefficients, complex)
    nw = len(wshape)
    if a.ndim < nw or a.shape[a.ndim - nw:] != wshape:
        raise ValueError(f"coefficients must end with the wave-vector shape {wshape}, got {a.shape}")
    lead = a.shape[:a.ndim - nw]
    flat = a.reshape(-1, kx.size)
    n_c, n_k = flat.shape
    ny, nx = grid.shape
    out = np.zeros((n_c, ny, nx), complex)
    chunk = max(1, _BLOCK_ELEMENTS // max(1, n_c * ny))
    for k0 in range(0, n_k, chunk):
        sl = slice(k0, min(n_k, k0 + chunk))
        ex, ey = _factors(grid, kx[sl], ky[sl], origin)
        b = flat[:, None, sl] * np.conj(ey)[None]               # (C, ny, k)
        out += b @ np.conj(ex).T                                 # (C, ny, nx)
    return out.reshape(lead + (ny, nx))


def grating_basis(grid: Grid, orientation_deg, sf_cpd, origin_deg=None):
    """Complex exponential images ``exp(+i 2 pi k . (x - xc))`` at the grid's pixel centres.

    The real part is the contract's grating of phase 0 and unit contrast, the imaginary part the grating
    of phase -90 deg. Builds the full ``(*W, ny, nx)`` stack: meant for small ``K`` (figures, reference
    checks); use :func:`fourier_at` for sums.

    Returns
    -------
    numpy.ndarray, complex, shape (*W, ny, nx)
    """
    origin = _origin(grid, origin_deg)
    wshape, kx, ky = _wave_vectors(orientation_deg, sf_cpd)
    ex, ey = _factors(grid, kx, ky, origin)
    return (ey.T[:, :, None] * ex.T[:, None, :]).reshape(wshape + grid.shape)


def _bin_widths_circular(ori_deg, period):
    """Width in degrees of each orientation's bin, edges at circular midpoints."""
    o = np.mod(np.asarray(ori_deg, float), period)
    order = np.argsort(o)
    s = o[order]
    if np.any(np.diff(s) <= 1e-9) or (s.size > 1 and s[0] + period - s[-1] <= 1e-9):
        raise ValueError("orientations_deg must be distinct modulo the period "
                         f"({period:g} deg), got {np.asarray(ori_deg).tolist()}")
    if s.size < 2:
        return np.full(o.shape, np.nan)
    nxt = np.roll(s, -1)
    nxt[-1] += period
    prv = np.roll(s, 1)
    prv[0] -= period
    w = np.empty_like(s)
    w[order] = (nxt - prv) / 2.0
    return w


def _sf_edges(sf, axis):
    """Lower and upper bin edges of each SF (edges at midpoints; outer bins symmetric)."""
    order = np.argsort(sf)
    s = sf[order]
    if np.any(np.diff(s) <= 0):
        raise ValueError(f"sfs_cpd must be distinct, got {sf.tolist()}")
    if s.size < 2:
        nan = np.full(sf.shape, np.nan)
        return nan, nan
    t = np.log(s) if axis == "log" else s
    mid = (t[1:] + t[:-1]) / 2.0
    lo = np.concatenate([[t[0] - (mid[0] - t[0])], mid])
    hi = np.concatenate([mid, [t[-1] + (t[-1] - mid[-1])]])
    if axis == "log":
        lo, hi = np.exp(lo), np.exp(hi)
    else:
        lo = np.maximum(lo, 0.0)
    lo_out = np.empty_like(lo)
    hi_out = np.empty_like(hi)
    lo_out[order], hi_out[order] = lo, hi
    return lo_out, hi_out


def _choose_sf_axis(sf):
    s = np.sort(sf)
    if s.size < 3 or s[0] <= 0:
        return "log" if s[0] > 0 else "linear"
    d_lin = np.diff(s)
    d_log = np.diff(np.log(s))
    cv_lin = np.std(d_lin) / np.mean(d_lin)
    cv_log = np.std(d_log) / np.mean(d_log)
    return "log" if cv_log <= cv_lin else "linear"


def polar_area_weights(orientations_deg, sfs_cpd, sf_axis="auto", period_deg=None):
    """Area of each cell of a polar orientation x SF grid in the ``(kx, ky)`` plane.

    Orientation bins have edges at the circular midpoints between neighbouring orientations; SF bins have
    edges at the midpoints on a log or linear SF axis, the outermost bins extending as far beyond their
    SF as to the inner midpoint. The area of the bin ``[theta1, theta2] x [f1, f2]`` is the exact integral
    of ``f df dtheta``: ``(theta2 - theta1) (f2^2 - f1^2) / 2`` with the angle in radians.

    Parameters
    ----------
    orientations_deg : array_like, shape (O,)
        Distinct orientations (wave-vector angles). If all lie in ``[0, 180)`` they tile half of the
        frequency plane (period 180 deg; the other half is the complex conjugate for a real map),
        otherwise the whole plane (period 360 deg).
    sfs_cpd : array_like, shape (S,)
        Distinct spatial frequencies (> 0 for a log axis, >= 0 for a linear one).
    sf_axis : {"auto", "log", "linear"}
        Where the SF midpoints are taken. ``"auto"`` picks the axis on which the SF steps are more nearly
        equal (log when there are fewer than three SFs).
    period_deg : {None, 180, 360}
        Override the orientation period.

    Returns
    -------
    numpy.ndarray, shape (O, S)
        Areas in (cycles/deg)^2. NaN everywhere when there is only one orientation or one SF (the bin
        width cannot be estimated).

    Examples
    --------
    >>> w = polar_area_weights([0, 45, 90, 135], [1.0, 2.0], sf_axis="linear")
    >>> bool(np.isclose(w.sum(), np.pi / 2 * (2.5**2 - 0.5**2)))
    True
    """
    ori = np.asarray(orientations_deg, float).ravel()
    sf = np.asarray(sfs_cpd, float).ravel()
    if ori.size == 0 or sf.size == 0:
        raise ValueError("orientations_deg and sfs_cpd must not be empty")
    if not (np.all(np.isfinite(ori)) and np.all(np.isfinite(sf))):
        raise ValueError("orientations_deg and sfs_cpd must be finite")
    if np.any(sf < 0):
        raise ValueError(f"sfs_cpd must be >= 0, got {sf.tolist()}")
    if sf_axis == "auto":
        sf_axis = _choose_sf_axis(sf)
    if sf_axis not in ("log", "linear"):
        raise ValueError(f"sf_axis must be 'auto', 'log' or 'linear', got {sf_axis!r}")
    if sf_axis == "log" and np.any(sf <= 0):
        raise ValueError("sfs_cpd must be > 0 on a log SF axis")
    period = orientation_period(ori) if period_deg is None else float(period_deg)
    if period not in (180.0, 360.0):
        raise ValueError(f"period_deg must be 180 or 360, got {period_deg!r}")
    dtheta = np.deg2rad(_bin_widths_circular(ori, period))
    lo, hi = _sf_edges(sf, sf_axis)
    return dtheta[:, None] * (hi**2 - lo**2)[None, :] / 2.0


def orientation_period(orientations_deg) -> float:
    """180 when all orientations lie in ``[0, 180)`` (half plane), else 360 (whole plane)."""
    o = np.asarray(orientations_deg, float)
    return 180.0 if np.all((o >= 0) & (o < 180)) else 360.0


# ----------------------------------------------------------------------------------------------------
# closed-form spectra of the spatial models (map2d.models), same convention as fourier_at
# ----------------------------------------------------------------------------------------------------

def _shift(kx, ky, x0, y0, origin):
    """``exp(+i 2 pi k . (x0 - xc))``: a model centred at ``(x0, y0)`` seen from the phase origin."""
    xc, yc = origin
    return np.exp(2j * np.pi * (kx * (np.asarray(x0, float) - xc) + ky * (np.asarray(y0, float) - yc)))


def _gauss_ft(ku, kv, su, sv):
    """Integral of ``exp(-u^2 / 2 su^2 - v^2 / 2 sv^2)`` times ``exp(+i 2 pi (ku u + kv v))``:
    ``2 pi su sv exp(-2 pi^2 (su^2 ku^2 + sv^2 kv^2))`` (Gaussian pair, Bracewell 2000)."""
    return 2 * np.pi * su * sv * np.exp(-2 * np.pi**2 * (su**2 * ku**2 + sv**2 * kv**2))


def _rotate_k(kx, ky, theta_deg):
    th = np.deg2rad(theta_deg)
    c, s = np.cos(th), np.sin(th)
    return kx * c + ky * s, -kx * s + ky * c


def gaussian_spectrum(orientation_deg, sf_cpd, x0, y0, sigma_u_deg, sigma_v_deg, theta_deg, amplitude,
                      origin_deg=(0.0, 0.0)):
    """Fourier transform of :func:`map2d.models.gaussian2d` at grating wave vectors (closed form).

    ``H = A 2 pi su sv exp(-2 pi^2 (su^2 ku^2 + sv^2 kv^2)) exp(+i 2 pi k . (x0 - xc))`` with
    ``(ku, kv)`` the wave vector along and across ``theta`` (the Gaussian pair and the shift theorem,
    Bracewell 2000), in the convention of :func:`fourier_at` but as an integral over the continuous
    plane: no pixel grid, so it holds at any SF. Parameters broadcast (per cell against per wave vector).

    Examples
    --------
    >>> h = gaussian_spectrum(0.0, 0.0, 0.0, 0.0, 1.0, 1.0, 0.0, 1.0)
    >>> bool(np.isclose(h, 2 * np.pi))      # the integral of a unit Gaussian of sd 1
    True
    """
    kx, ky = wave_vector(np.asarray(orientation_deg, float), np.asarray(sf_cpd, float))
    ku, kv = _rotate_k(kx, ky, theta_deg)
    return amplitude * _gauss_ft(ku, kv, sigma_u_deg, sigma_v_deg) * _shift(kx, ky, x0, y0, origin_deg)


def dog_spectrum_at(orientation_deg, sf_cpd, x0, y0, kc, rc_deg, ks, rs_deg, origin_deg=(0.0, 0.0)):
    """Fourier transform of :func:`map2d.models.dog2d` at grating wave vectors (closed form).

    ``(kc pi rc^2 exp(-(pi rc f)^2) - ks pi rs^2 exp(-(pi rs f)^2)) exp(+i 2 pi k . (x0 - xc))``
    (:func:`map2d.models.dog_spectrum` with the shift theorem; Bracewell 2000).
    """
    from .models import dog_spectrum
    kx, ky = wave_vector(np.asarray(orientation_deg, float), np.asarray(sf_cpd, float))
    f = np.hypot(kx, ky)
    return dog_spectrum(f, kc, rc_deg, ks, rs_deg) * _shift(kx, ky, x0, y0, origin_deg)


def gabor_spectrum(orientation_deg, sf_cpd, x0, y0, sigma_u_deg, sigma_v_deg, theta_deg, f0_cpd, phase_deg,
                   amplitude, origin_deg=(0.0, 0.0)):
    """Fourier transform of :func:`map2d.models.gabor2d` at grating wave vectors (closed form).

    The carrier ``cos(2 pi f0 u + phi) = (e^{i(2 pi f0 u + phi)} + e^{-i(2 pi f0 u + phi)}) / 2`` shifts
    the envelope's transform ``G`` (:func:`gaussian_spectrum`) to ``-+ f0`` along ``u`` (modulation
    theorem, Bracewell 2000)::

        H = A / 2 (e^{i phi} G(ku + f0, kv) + e^{-i phi} G(ku - f0, kv)) exp(+i 2 pi k . (x0 - xc))

    Examples
    --------
    >>> h = gabor_spectrum(0.0, 0.1, 0.0, 0.0, 3.0, 3.0, 0.0, 0.1, 0.0, 1.0)
    >>> bool(np.isclose(h.real, np.pi * 9 * (1 + np.exp(-2 * np.pi**2 * 9 * 0.04))))
    True
    """
    kx, ky = wave_vector(np.asarray(orientation_deg, float), np.asarray(sf_cpd, float))
    ku, kv = _rotate_k(kx, ky, theta_deg)
    ph = np.deg2rad(phase_deg)
    h = 0.5 * amplitude * (np.exp(1j * ph) * _gauss_ft(ku + f0_cpd, kv, sigma_u_deg, sigma_v_deg)
                           + np.exp(-1j * ph) * _gauss_ft(ku - f0_cpd, kv, sigma_u_deg, sigma_v_deg))
    return h * _shift(kx, ky, x0, y0, origin_deg)


def nyquist_mask(grid: Grid, orientation_deg, sf_cpd, margin=1.0):
    """True where a wave vector lies inside the grid's Nyquist band, ``|kx| dx <= 1/2`` and
    ``|ky| dy <= 1/2`` (times ``margin``): where a map sampled on ``grid`` determines its Fourier sum.
    Beyond it the sum of the sampled map picks up the mirror image of the spectrum (aliasing)."""
    kx, ky = wave_vector(np.asarray(orientation_deg, float), np.asarray(sf_cpd, float))
    return ((np.abs(kx) * grid.dx_deg <= 0.5 * margin + 1e-12)
            & (np.abs(ky) * grid.dy_deg <= 0.5 * margin + 1e-12))
