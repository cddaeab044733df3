"""Space-time receptive fields: separability, direction and speed of motion, slices, and predictions.

Every map is a space-time map ``m(p, l)`` (pixels ``p``, lags ``l``). A space-time separable cell has
``m = u(p) s(l)``: one spatial map scaled by one time course. A direction-selective simple cell has a
tilted field (DeAngelis, Ohzawa & Freeman 1993): its spatial structure shifts with the lag, and its
map needs (at least) two separable components, typically an even and an odd spatial part with their
own time courses. This module measures that on the z-map (unit noise variance per value), inside a
window around the cell:

- **Noise-corrected separability.** With ``M = S + N`` (``L`` lags x ``P`` pixels, white noise of
  variance ``s^2``), the squared singular values of ``M`` are inflated by the noise. For a component of
  signal power ``theta`` above the noise edge ``s^2 (sqrt(P) + sqrt(L))^2``, the top squared singular
  value is ``(theta + P s^2)(theta + L s^2) / theta`` (the spiked rectangular model; Benaych-Georges &
  Nadakuditi 2012), which we invert for ``theta_1``; the map's signal power is
  ``||M||^2 - L P s^2``. ``st_separability = theta_1 / (||M||^2 - L P s^2)``, clipped to [0, 1]: near 1
  for a separable cell at any SNR (both numerator and denominator lose the same noise), lower for a
  tilted one. NaN when the first component does not clear the noise edge. ``s^2`` is the mean square
  of the z-map outside the window (1 when too few pixels lie outside).
- **Inseparable call.** The second singular value against the largest singular value of pure noise of
  the residual's size (``(L - 1) x (P - 1)`` Gaussian matrices, 99th percentile of 400 draws, seeded):
  a calibrated test at level 0.01 that a second component is present; the map is called inseparable
  when it is and ``st_separability <= 0.85`` (:data:`INSEPARABLE_MAX`, ours). A significant second
  component is kept in the denoised map either way.
- **Direction and speed.** The denoised map (the significant components inside the window, 1 or 2)
  predicts its response to drifting gratings: for direction ``theta``, SF ``f`` and TF ``w`` the
  amplitude is ``|sum_l exp(i 2 pi w tau_l) H(f n_theta, tau_l)|`` with
  ``H(k, tau) = sum_p m(p, tau) exp(+i 2 pi k . x_p)`` (map2d's Fourier convention) and ``tau_l`` the
  lag. A grating ``cos(2 pi f u - 2 pi w t + phase)`` moves toward ``theta`` (the session format), so the
  maximum over ``theta`` (3-deg steps, 0-360), ``f`` and ``w > 0`` gives ``st_direction_deg`` (same
  wave-vector convention as the drifting gratings' ``pref_direction_deg``) and ``st_speed_deg_s = w / f``;
  ``st_dsi`` compares the energy (sum of squared amplitudes over all ``f`` and ``w``) of the preferred
  and the opposite direction, ``(E_pref - E_opp) / (E_pref + E_opp)``. A separable map answers both
  directions alike (``st_dsi`` 0), so direction and speed are reported only for inseparable maps.
- **Slices.** The map summed across the cell's axis: ``st_slice_across`` (positions along the axis, i.e.
  across the stripes, by lag) and ``st_slice_along`` (along the stripes), in bins of one pixel spacing
  centred on the cell; the axis is the direction for inseparable maps and the preferred orientation
  (the same maximum, mod 180) otherwise. A tilted field shows as oblique stripes in
  ``st_slice_across``.
- **Predictions lag by lag.** :func:`predict_flashed_st` predicts the flashed-grating surface from the
  denoised space-time map at each of the gratings' lags and pools the lags with the gratings' own
  temporal weights (the same pooling that makes the measured surface), so the agreement of a tilted
  cell compares like with like instead of a separable reduction that blurs its map.

References
----------
DeAngelis GC, Ohzawa I, Freeman RD (1993) Spatiotemporal organization of simple-cell receptive fields
in the cat's striate cortex. I. General characteristics and postnatal development. J Neurophysiol
69:1091-1117.
Benaych-Georges F, Nadakuditi RR (2012) The singular values and vectors of low rank perturbations of
large rectangular random matrices. J Multivar Anal 111:120-135.
Adelson EH, Bergen JR (1985) Spatiotemporal energy models for the perception of motion. J Opt Soc Am A
2:284-299 (motion as orientation in space-time).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np

__all__ = ["SpaceTime", "space_time", "spiked_power", "model_space_time", "predict_flashed_st", "st_columns",
           "ST_COLUMNS"]

#: Columns :func:`space_time` adds to ``cells.csv``.
ST_COLUMNS = ("st_separability", "st_inseparable", "st_direction_deg", "st_speed_deg_s", "st_dsi",
              "st_direction_diff_deg")

_NULL_DRAWS = 400
#: Largest ``st_separability`` of a map called inseparable (ours): besides being significant, the second
#: component must carry at least 15 % of the signal power. At high SNR the rectification of a separable
#: simple cell leaves a significant but tiny second component (separability 0.96 in the held-out
#: check, against 0.59-0.69 for tilted cells and 0.91-1.0 for separable ones).
INSEPARABLE_MAX = 0.85
_ALPHA = 0.01


@dataclass
class SpaceTime:
    """Per-cell space-time results (NaN / False for cells not analysed).

    Attributes
    ----------
    separability, direction_deg, speed_deg_s, dsi, axis_deg : ndarray (C,)
    inseparable : ndarray bool (C,)
    n_components : ndarray int (C,)  components kept in the denoised map (0: not analysed)
    denoised : ndarray (C, L, ny, nx)  the denoised space-time map in response units (the significant
        components inside the window; 0 outside it; NaN for cells not analysed)
    slice_across, slice_along : ndarray (C, L, B)  slices (response units summed across the other axis)
    slice_positions_deg : ndarray (B,)  bin centres relative to the cell's centre
    components : ndarray (C, 2, ny, nx)  the kept spatial components in response units (0 outside the
        window, NaN when not kept)
    time_courses : ndarray (C, L, 2)  their time courses (unit norm)
    """

    separability: np.ndarray
    inseparable: np.ndarray
    direction_deg: np.ndarray
    speed_deg_s: np.ndarray
    dsi: np.ndarray
    axis_deg: np.ndarray
    n_components: np.ndarray
    denoised: np.ndarray
    slice_across: np.ndarray
    slice_along: np.ndarray
    slice_positions_deg: np.ndarray
    components: np.ndarray = None
    time_courses: np.ndarray = None
    notes: list = field(default_factory=list)


def spiked_power(s2, n_rows, n_cols, noise_var=1.0):
    """Signal power ``theta`` of a rank-1 component whose squared singular value in noise is ``s2``.

    Inverts ``s2 = (theta + n_cols v)(theta + n_rows v) / theta`` (``v`` the noise variance;
    Benaych-Georges & Nadakuditi 2012); NaN at or below the noise edge ``v (sqrt(n_rows) +
    sqrt(n_cols))^2``.

    Examples
    --------
    >>> th = 50.0; v = 1.0; L, P = 6, 80
    >>> s2 = (th + P * v) * (th + L * v) / th
    >>> round(float(spiked_power(s2, L, P, v)), 6)
    50.0
    """
    s2 = np.asarray(s2, float)
    a = s2 - (n_rows + n_cols) * noise_var
    disc = a * a - 4.0 * n_rows * n_cols * noise_var ** 2
    edge = noise_var * (np.sqrt(n_rows) + np.sqrt(n_cols)) ** 2
    with np.errstate(invalid="ignore"):
        th = 0.5 * (a + np.sqrt(np.maximum(disc, 0.0)))
    return np.where((s2 > edge) & (disc >= 0), th, np.nan)


_NULL_CACHE: dict = {}


def _null_top(n_rows, n_cols):
    """99th percentile of the top squared singular value of an ``n_rows x n_cols`` unit Gaussian matrix."""
    key = (int(n_rows), int(n_cols))
    if key not in _NULL_CACHE:
        rng = np.random.default_rng(12345)
        draws = [np.linalg.svd(rng.standard_normal(key), compute_uv=False)[0] ** 2 for _ in range(_NULL_DRAWS)]
        _NULL_CACHE[key] = float(np.quantile(draws, 1 - _ALPHA))
    return _NULL_CACHE[key]


def _grating_amplitudes(m, xw, yw, lags_s, sfs, tfs, thetas, box=None):
    """``A[theta, f, w]`` of a windowed space-time map ``m`` (L, Pw) at pixel positions (xw, yw).

    With ``box = (dx, dy, frame_s)`` the map's own blur is divided out: the pixel box
    ``sinc(kx dx) sinc(ky dy)`` and the frame's triangle in time ``sinc(w T)^2`` (a spot lasts one frame
    and the response is averaged over one frame), so the amplitudes are those of the kernel, which the
    drifting gratings see."""
    th = np.deg2rad(thetas)
    kx = sfs[None, :] * np.cos(th)[:, None]                               # (T, F)
    ky = sfs[None, :] * np.sin(th)[:, None]
    e = np.exp(2j * np.pi * (kx[..., None] * xw + ky[..., None] * yw))   # (T, F, Pw)
    H = np.einsum("tfp,lp->tfl", e, m)                                    # (T, F, L)
    ph = np.exp(2j * np.pi * tfs[:, None] * lags_s[None, :])             # (W, L)
    A = np.abs(np.einsum("tfl,wl->tfw", H, ph))
    if box is not None:
        dx, dy, T = box
        A = A / np.abs(np.sinc(kx * dx) * np.sinc(ky * dy))[..., None] / (np.sinc(tfs * T) ** 2)[None, None, :]
    return A


def space_time(maps, map_kind, centres_deg, sizes_deg=None, window_sd: float = 2.5) -> SpaceTime:
    """Separability, direction, speed and slices of every responsive cell's space-time map.

    Parameters
    ----------
    maps : map2d.maps.MapResult
    map_kind : array of str (C,)  'linear', 'on+off' or '' (see :func:`map2d.analysis.spatial_maps`); the
        linear map is used, the ON + OFF map for 'on+off' cells
    centres_deg : ndarray (C, 2)  cell centres (NaN: the peak pixel of the peak-lag map is used)
    sizes_deg : ndarray (C,), optional  envelope sd; the window radius is ``window_sd`` sizes, at least
        3 pixel spacings (default 3 spacings x ``window_sd`` / 2.5 when unknown)
    window_sd : float

    Returns
    -------
    SpaceTime
    """
    grid = maps.grid
    C = maps.n_cells
    L = maps.lags_s.size
    ny, nx = grid.shape
    d = float(np.sqrt(grid.dx_deg * grid.dy_deg))
    X, Y = np.meshgrid(grid.x_deg, grid.y_deg)
    xs, ys = X.ravel(), Y.ravel()
    nan = np.full(C, np.nan)
    R_max = 0.5 * float(np.hypot(grid.nx * grid.dx_deg, grid.ny * grid.dy_deg))
    nb = int(2 * np.ceil(R_max / d) + 1)
    pos = (np.arange(nb) - nb // 2) * d
    out = SpaceTime(separability=nan.copy(), inseparable=np.zeros(C, bool), direction_deg=nan.copy(),
                    speed_deg_s=nan.copy(), dsi=nan.copy(), axis_deg=nan.copy(), n_components=np.zeros(C, int),
                    denoised=np.full((C, L, ny, nx), np.nan, np.float32),
                    slice_across=np.full((C, L, nb), np.nan, np.float32),
                    slice_along=np.full((C, L, nb), np.nan, np.float32), slice_positions_deg=pos,
                    components=np.full((C, 2, ny, nx), np.nan), time_courses=np.full((C, L, 2), np.nan))
    if maps.stimulus != "sparse" and not np.isfinite(maps.linear_z).any():
        return out
    lags_s = np.asarray(maps.lags_s, float)
    frame = float(maps.frame_s)
    extent = max(grid.nx * grid.dx_deg, grid.ny * grid.dy_deg)
    sfs = np.geomspace(0.5 / extent, 0.5 / d, 24)
    tfs = np.linspace(0.5, 0.45 / frame, 20) if L > 1 else np.array([0.0])
    thetas = np.arange(0.0, 360.0, 3.0)
    sizes = np.full(C, np.nan) if sizes_deg is None else np.asarray(sizes_deg, float)
    for c in np.flatnonzero(np.asarray(maps.responsive, bool)):
        onoff = str(map_kind[c]) == "on+off" and np.isfinite(maps.on_z[c]).any()
        if onoff:
            z = (maps.on_z[c].astype(float) + maps.off_z[c].astype(float)) / np.sqrt(2.0)
            v = (maps.on[c].astype(float) + maps.off[c].astype(float))
        else:
            z, v = maps.linear_z[c].astype(float), maps.linear[c].astype(float)
        z = np.nan_to_num(z.reshape(L, -1))
        v = np.nan_to_num(v.reshape(L, -1))
        cx, cy = (np.asarray(centres_deg[c], float) if centres_deg is not None else (np.nan, np.nan))
        if not (np.isfinite(cx) and np.isfinite(cy)):
            li = int(maps.peak_lag_index[c])
            p = int(np.argmax(np.abs(z[li])))
            cx, cy = xs[p], ys[p]
        rad = window_sd * sizes[c] if np.isfinite(sizes[c]) else 3.0 * d * window_sd / 2.5
        rad = max(rad, 3.0 * d)
        win = np.hypot(xs - cx, ys - cy) <= rad
        Pw = int(win.sum())
        if Pw < 4 or L < 2:
            continue
        outside = ~win
        noise_var = float(np.mean(z[:, outside] ** 2)) if outside.sum() * L >= 200 else 1.0
        M = z[:, win]
        U, S, Vt = np.linalg.svd(M, full_matrices=False)
        th1 = float(spiked_power(S[0] ** 2, L, Pw, noise_var))
        total = float(np.sum(M * M) - L * Pw * noise_var)
        if np.isfinite(th1) and total > 0:
            out.separability[c] = min(max(th1 / total, 0.0), 1.0)
        else:
            continue
        second = S.size > 1 and S[1] ** 2 > noise_var * _null_top(L - 1, Pw - 1)
        insep = bool(second and out.separability[c] <= INSEPARABLE_MAX)
        out.inseparable[c] = insep
        k = 2 if second else 1
        out.n_components[c] = k
        # denoised map in response units: the kept components of the z-map, rescaled pixel by pixel
        with np.errstate(invalid="ignore", divide="ignore"), warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)       # pixels never shown: all-NaN columns
            scale = np.where(np.abs(z[:, win]) > 0, v[:, win] / z[:, win], np.nan)
            sc = np.nanmedian(scale, axis=0)
            sc = np.where(np.isfinite(sc), sc, np.nanmedian(scale) if np.isfinite(scale).any() else 0.0)
        low = (U[:, :k] * S[:k]) @ Vt[:k]                                  # (L, Pw) in z units
        den = np.zeros((L, ny * nx))
        den[:, win] = low * sc[None, :]
        out.denoised[c] = den.reshape(L, ny, nx)
        for j in range(k):
            comp = np.zeros(ny * nx)
            comp[win] = S[j] * Vt[j] * sc
            out.components[c, j] = comp.reshape(ny, nx)
            out.time_courses[c, :, j] = U[:, j]
        A = _grating_amplitudes(den[:, win], xs[win] - cx, ys[win] - cy, lags_s, sfs, tfs, thetas)
        # direction from the map's own amplitudes (the deblurred ones grow near the Nyquist TF, where
        # the two directions cannot be told apart); speed from the deblurred ones along that direction
        t = np.unravel_index(int(np.argmax(A)), A.shape)[0]
        Ad = A[t] / np.abs(np.sinc(sfs * np.cos(np.deg2rad(thetas[t])) * grid.dx_deg)
                           * np.sinc(sfs * np.sin(np.deg2rad(thetas[t])) * grid.dy_deg))[:, None] \
            / (np.sinc(tfs * frame) ** 2)[None, :]
        f, w = np.unravel_index(int(np.argmax(Ad)), Ad.shape)
        # direction index of the map's energy along the axis, all SFs and TFs pooled (robust to where
        # the maximum falls; the blur factors are the same for both directions)
        e_pref = float(np.sum(A[t] ** 2))
        e_opp = float(np.sum(A[(t + thetas.size // 2) % thetas.size] ** 2))
        out.dsi[c] = (e_pref - e_opp) / (e_pref + e_opp) if e_pref + e_opp > 0 else np.nan
        if insep:
            out.direction_deg[c] = float(thetas[t])
            out.speed_deg_s[c] = float(tfs[w] / sfs[f])
            axis = float(thetas[t])
        else:
            axis = float(thetas[t] % 180.0)
        out.axis_deg[c] = axis
        a = np.deg2rad(axis)
        u = (xs[win] - cx) * np.cos(a) + (ys[win] - cy) * np.sin(a)
        b = -(xs[win] - cx) * np.sin(a) + (ys[win] - cy) * np.cos(a)
        for arr, coord in ((out.slice_across, u), (out.slice_along, b)):
            idx = np.clip(np.round(coord / d).astype(int) + nb // 2, 0, nb - 1)
            sl = np.zeros((L, nb))
            for li in range(L):
                sl[li] = np.bincount(idx, weights=v[li, win], minlength=nb)
            arr[c] = sl
    return out


def model_space_time(st: SpaceTime, grid, cells=None, n_jobs=None):
    """Noise-free space-time maps: each kept spatial component fitted with the spatial models
    (:func:`map2d.fit.spatial.fit_maps`: Gaussian, DoG, Gabor by BIC) and multiplied by its own time
    course (an even and an odd spatial part with their own time courses, for a tilted field).

    Returns ndarray (C, L, ny, nx): NaN for cells not modelled (``cells`` False, or no component).
    """
    from .fit.spatial import fit_maps
    C, L = st.time_courses.shape[:2]
    ny, nx = grid.shape
    sel = st.n_components > 0 if cells is None else (np.asarray(cells, bool) & (st.n_components > 0))
    out = np.full((C, L, ny, nx), np.nan)
    if not sel.any():
        return out
    total = np.zeros((C, L, ny, nx))
    for j in range(2):
        use = sel & (st.n_components > j)
        if not use.any():
            continue
        _, pred = fit_maps(np.nan_to_num(st.components[:, j]), grid, use, n_jobs=n_jobs, return_predicted=True)
        total += np.nan_to_num(st.time_courses[:, :, j])[:, :, None, None] * np.nan_to_num(pred)[:, None]
    out[sel] = total[sel]
    return out


def predict_flashed_st(denoised, map_lags_s, grid, flashed, origin_deg):
    """Flashed-grating surface predicted from space-time maps lag by lag, pooled like the measured one.

    The response to a grating flashed for one frame ``T_g`` and read in the window ``l`` frames later
    weighs the kernel's delays by the triangle ``max(0, 1 - |tau - l T_g| / T_g)``; the map at lag
    ``tau_j`` stands for the kernel near delay ``tau_j``, so the prediction at the gratings' lag ``l`` is
    ``sum_j tri((tau_j - l T_g) / T_g) H_map(k, tau_j)`` (``H_map`` the map's Fourier sum at the wave
    vector, :func:`map2d.reconcile.predict_gratings`), and the lags are pooled with the gratings'
    ``temporal_weights`` (``sum_l w_l``), as ``harmonic_combined`` is. One gain is fitted by the
    agreement, so the triangle's scale does not matter. Divided by the pixel box's transfer (the
    gratings see the bare kernel) and NaN beyond the grid's Nyquist band, as
    :func:`map2d.reconcile.forward_prediction` does for sampled maps.

    Parameters
    ----------
    denoised : ndarray (C, L, ny, nx)  space-time maps (NaN rows: cells not predicted)
    map_lags_s : ndarray (L,)
    grid : Grid
    flashed : map2d.gratings.FlashedResult
    origin_deg : (float, float)  phase origin

    Returns
    -------
    ndarray complex (C, O, S)  NaN for cells without a map
    """
    from .reconcile import pixel_box_transfer, predict_gratings
    from .spectral import nyquist_mask
    C, L = denoised.shape[:2]
    ori, sfs = flashed.orientations_deg, flashed.sfs_cpd
    gl = np.asarray(flashed.lags_s, float)
    Tg = float(flashed.frame_s)
    tri = np.maximum(0.0, 1.0 - np.abs(np.asarray(map_lags_s, float)[None, :] - gl[:, None]) / Tg)   # (Lg, L)
    w = np.asarray(flashed.temporal_weights, float)                                                   # (C, Lg)
    out = np.full((C, ori.size, sfs.size), np.nan, complex)
    ok = np.isfinite(denoised).reshape(C, -1).all(axis=1)
    if not ok.any():
        return out
    idx = np.flatnonzero(ok)
    per_lag = np.stack([predict_gratings(denoised[idx, j], grid, ori, sfs, origin_deg) for j in range(L)],
                       axis=-1)                                                                       # (n, O, S, L)
    pooled = np.einsum("nosj,gj,ng->nos", per_lag, tri, np.nan_to_num(w[idx]))
    # the gratings see the bare kernel: divide by the pixel box's transfer; beyond the grid's Nyquist
    # band a sampled map cannot tell a frequency from its mirror image, so no prediction there
    box = pixel_box_transfer(grid, ori[:, None], sfs[None, :], min_value=0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        pooled = pooled / box
    inside = nyquist_mask(grid, ori[:, None], sfs[None, :])
    out[idx] = np.where(inside[None], pooled, np.nan)
    return out


def st_columns(st: SpaceTime, pref_direction_deg=None) -> dict:
    """The ``cells.csv`` columns of :data:`ST_COLUMNS`; ``st_direction_diff_deg`` is the angle (0-180)
    between ``st_direction_deg`` and the drifting gratings' ``pref_direction_deg`` when both exist."""
    C = st.separability.size
    analysed = np.isfinite(st.separability)
    diff = np.full(C, np.nan)
    if pref_direction_deg is not None:
        pd = np.asarray([np.nan if v is None else v for v in pref_direction_deg], float)
        with np.errstate(invalid="ignore"):
            diff = np.abs((st.direction_deg - pd + 180.0) % 360.0 - 180.0)
    return {"st_separability": st.separability,
            "st_inseparable": np.array([bool(v) if a else None for v, a in zip(st.inseparable, analysed)], object),
            "st_direction_deg": st.direction_deg, "st_speed_deg_s": st.speed_deg_s, "st_dsi": st.dsi,
            "st_direction_diff_deg": diff}
