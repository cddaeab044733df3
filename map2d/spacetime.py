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
import scipy.sparse as sp

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
    """99th percentile of the top squared singular value of an ``n_rows x n_cols`` unit Gaussian matrix
    (400 seeded draws; the top eigenvalue of each draw's ``n_rows x n_rows`` Gram matrix, all at once)."""
    key = (int(n_rows), int(n_cols))
    if key not in _NULL_CACHE:
        rng = np.random.default_rng(12345)
        top = []
        per = max(1, min(_NULL_DRAWS, (1 << 20) // max(key[0] * key[1], 1)))      # draws per batch
        for a in range(0, _NULL_DRAWS, per):
            x = rng.standard_normal((min(per, _NULL_DRAWS - a),) + key)
            top.append(np.linalg.eigvalsh(np.matmul(x, x.transpose(0, 2, 1)))[:, -1])
        _NULL_CACHE[key] = float(np.quantile(np.concatenate(top), 1 - _ALPHA))
    return _NULL_CACHE[key]


def _grating_amplitudes(m, xw, yw, lags_s, sfs, tfs, thetas, box=None):
    """``A[theta, f, w]`` of a windowed space-time map ``m`` (L, Pw) at pixel positions (xw, yw).

    With ``box = (dx, dy, frame_s)`` the map's own blur is divided out: the pixel box
    ``sinc(kx dx) sinc(ky dy)`` and the frame's triangle in time ``sinc(w T)^2`` (a spot lasts one frame
    and the response is averaged over one frame), so the amplitudes are those of the kernel, which the
    drifting gratings see. (:func:`space_time` computes the same amplitudes for many cells at once from
    their kept components.)"""
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


def _nanmedian_last(a):
    """``np.nanmedian(a, axis=-1)`` (the mean of the two middle finite values; NaN when none) by one sort."""
    s = np.sort(a, axis=-1)                                     # NaN sort last
    cnt = np.isfinite(a).sum(axis=-1)
    h = cnt // 2
    lo = np.where(cnt % 2 == 1, h, h - 1)
    hi_v = np.take_along_axis(s, np.minimum(h, a.shape[-1] - 1)[..., None], axis=-1)[..., 0]
    lo_v = np.take_along_axis(s, np.maximum(lo, 0)[..., None], axis=-1)[..., 0]
    return np.where(cnt > 0, (lo_v + hi_v) / 2.0, np.nan)


#: Values (cells x lags x pixels) per block of cells in :func:`space_time`.
_BLOCK_VALUES = 1 << 19
#: Amplitudes (cells x directions x SFs x TFs) per block of cells in :func:`space_time`.
_AMP_VALUES = 1 << 20


def space_time(maps, map_kind, centres_deg, sizes_deg=None, window_sd: float = 2.5) -> SpaceTime:
    """Separability, direction, speed and slices of every responsive cell's space-time map.

    All cells are analysed together, in blocks: one SVD per group of cells with windows of the same
    size, the grating amplitudes of every cell and direction from one product of the kept components
    with the Fourier factors of the grid.

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
    P = ny * nx
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
    cells = np.flatnonzero(np.asarray(maps.responsive, bool))
    if cells.size == 0 or L < 2:
        return out
    lags_s = np.asarray(maps.lags_s, float)
    frame = float(maps.frame_s)
    extent = max(grid.nx * grid.dx_deg, grid.ny * grid.dy_deg)
    sfs = np.geomspace(0.5 / extent, 0.5 / d, 24)
    tfs = np.linspace(0.5, 0.45 / frame, 20)
    thetas = np.arange(0.0, 360.0, 3.0)
    T2 = thetas.size // 2                      # directions 180 deg apart: opposite wave vectors
    sizes = np.full(C, np.nan) if sizes_deg is None else np.asarray(sizes_deg, float)
    centres = (np.full((C, 2), np.nan) if centres_deg is None else np.asarray(centres_deg, float))
    kinds = np.asarray([str(k) for k in map_kind], object)
    # Fourier factors of the grid for the directions 0-180 deg (the others are their conjugates)
    th = np.deg2rad(thetas[:T2])
    kx = (sfs[None, :] * np.cos(th)[:, None]).ravel()
    ky = (sfs[None, :] * np.sin(th)[:, None]).ravel()
    arg = 2 * np.pi * (xs[:, None] * kx[None, :] + ys[:, None] * ky[None, :])          # (P, T2 * F)
    e_re, e_im = np.cos(arg), np.sin(arg)
    del arg
    ph = np.exp(2j * np.pi * tfs[:, None] * lags_s[None, :])                             # (W, L)
    deblur_t = np.sinc(tfs * frame) ** 2
    step = max(1, min(_BLOCK_VALUES // (L * P), _AMP_VALUES // (thetas.size * sfs.size * tfs.size)))
    for b0 in range(0, cells.size, step):
        _space_time_block(out, maps, cells[b0:b0 + step], kinds, centres, sizes, window_sd, xs, ys, d, nb,
                          thetas, sfs, tfs, e_re, e_im, ph, deblur_t, grid)
    return out


def _space_time_block(out, maps, blk, kinds, centres, sizes, window_sd, xs, ys, d, nb, thetas, sfs, tfs,
                      e_re, e_im, ph, deblur_t, grid):
    """:func:`space_time` for the cells ``blk`` (written into ``out``)."""
    n, L = blk.size, maps.lags_s.size
    ny, nx = grid.shape
    P = ny * nx
    r = np.arange(n)
    onoff = (kinds[blk] == "on+off") & np.isfinite(maps.on_z[blk].reshape(n, -1)).any(axis=1)
    z = maps.linear_z[blk].reshape(n, L, P).astype(float)
    v = maps.linear[blk].reshape(n, L, P).astype(float)
    if onoff.any():
        o = blk[onoff]
        z[onoff] = (maps.on_z[o].reshape(-1, L, P).astype(float) + maps.off_z[o].reshape(-1, L, P).astype(float)) \
            / np.sqrt(2.0)
        v[onoff] = maps.on[o].reshape(-1, L, P).astype(float) + maps.off[o].reshape(-1, L, P).astype(float)
    z, v = np.nan_to_num(z), np.nan_to_num(v)
    # centre (the peak pixel of the peak-lag map when unknown) and window
    cx, cy = centres[blk, 0].copy(), centres[blk, 1].copy()
    miss = ~(np.isfinite(cx) & np.isfinite(cy))
    if miss.any():
        li = maps.peak_lag_index[blk[miss]].astype(np.int64)
        p = np.argmax(np.abs(z[miss][np.arange(miss.sum()), li]), axis=1)
        cx[miss], cy[miss] = xs[p], ys[p]
    rad = np.where(np.isfinite(sizes[blk]), window_sd * sizes[blk], 3.0 * d * window_sd / 2.5)
    rad = np.maximum(rad, 3.0 * d)
    win = np.hypot(xs[None, :] - cx[:, None], ys[None, :] - cy[:, None]) <= rad[:, None]       # (n, P)
    Pw = win.sum(axis=1)
    n_out = P - Pw
    z2 = np.einsum("nlp,nlp->np", z, z)
    with np.errstate(invalid="ignore", divide="ignore"):
        noise_var = np.where(n_out * L >= 200, np.where(win, 0.0, z2).sum(axis=1) / (n_out * L), 1.0)
    comps = np.zeros((n, 2, P))                      # kept spatial components (response units), 0 if not kept
    U2 = np.zeros((n, L, 2))                         # their time courses
    kept = np.zeros(n, bool)
    for size in np.unique(Pw[Pw >= 4]):              # one batched SVD per window size
        g = np.flatnonzero(Pw == size)
        m = g.size
        idx = np.nonzero(win[g])[1].reshape(m, size)                         # window pixels, in order
        M = np.take_along_axis(z[g], idx[:, None, :], axis=2)               # (m, L, Pw)
        Vw = np.take_along_axis(v[g], idx[:, None, :], axis=2)
        U, S, Vt = np.linalg.svd(M, full_matrices=False)
        nv = noise_var[g]
        th1 = spiked_power(S[:, 0] ** 2, L, size, nv)
        total = np.einsum("mlp,mlp->m", M, M) - L * size * nv
        ok = np.isfinite(th1) & (total > 0)
        if not ok.any():
            continue
        with np.errstate(invalid="ignore", divide="ignore"):
            sep = np.minimum(np.maximum(th1 / total, 0.0), 1.0)
        second = (S[:, 1] ** 2 > nv * _null_top(L - 1, size - 1)) if S.shape[1] > 1 else np.zeros(m, bool)
        insep = second & (sep <= INSEPARABLE_MAX)
        k = np.where(second, 2, 1)
        c = blk[g[ok]]
        out.separability[c] = sep[ok]
        out.inseparable[c] = insep[ok]
        out.n_components[c] = k[ok]
        # denoised map in response units: the kept components of the z-map, rescaled pixel by pixel
        with np.errstate(invalid="ignore", divide="ignore"), warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)       # pixels never shown: all-NaN columns
            scale = np.where(np.abs(M) > 0, Vw / M, np.nan)
            sc = _nanmedian_last(np.swapaxes(scale, 1, 2))                  # (m, Pw): median over lags
            bad = ~np.isfinite(sc).all(axis=1)
            if bad.any():                                   # pixels without a scale: the window's median
                fall = _nanmedian_last(scale[bad].reshape(int(bad.sum()), -1))
                sc[bad] = np.where(np.isfinite(sc[bad]), sc[bad], np.where(np.isfinite(fall), fall, 0.0)[:, None])
        Sk = np.where(np.arange(2)[None, :] < k[:, None], S[:, :2], 0.0)    # (m, 2), 0: not kept
        low = np.matmul(U[:, :, :2] * Sk[:, None, :], Vt[:, :2])             # (m, L, Pw) in z units
        den = np.zeros((m, L, P))
        np.put_along_axis(den, idx[:, None, :], low * sc[:, None, :], axis=2)
        comp = np.zeros((m, 2, P))
        np.put_along_axis(comp, idx[:, None, :], Sk[:, :, None] * Vt[:, :2] * sc[:, None, :], axis=2)
        out.denoised[c] = den[ok].reshape(-1, L, ny, nx)
        two = k[ok] == 2
        cc = np.where(two[:, None, None], comp[ok], np.nan)
        cc[:, 0] = comp[ok][:, 0]
        out.components[c] = cc.reshape(-1, 2, ny, nx)
        tc = U[ok][:, :, :2].copy()
        tc[~two, :, 1] = np.nan
        out.time_courses[c] = tc
        comps[g[ok]] = comp[ok]
        U2[g[ok]] = np.where((np.arange(2)[None, :] < k[ok][:, None])[:, None, :], U[ok][:, :, :2], 0.0)
        kept[g[ok]] = True
    if not kept.any():
        return
    sel = np.flatnonzero(kept)
    n, c = sel.size, blk[sel]
    # grating amplitudes A[theta, f, w] = |sum_j Q_j(w) G_j(theta, f)|: G_j the Fourier sum of component
    # j (the window centre only turns its phase, the same for both components; the components are zero
    # outside their windows, hence a sparse product), Q_j that of its time course. Squared:
    # A^2 = |Q_0|^2 |G_0|^2 + |Q_1|^2 |G_1|^2 + 2 Re(Q_0 Q_1* G_0* G_1)... written as one product of
    # four terms in (theta, f) by four in w; the opposite direction has the conjugate G
    T, F, W = thetas.size, sfs.size, tfs.size
    T2 = T // 2
    flat = sp.csr_matrix(comps[sel].reshape(2 * n, P))
    Gr = np.asarray(flat @ e_re).reshape(n, 2, T2 * F)
    Gi = np.asarray(flat @ e_im).reshape(n, 2, T2 * F)
    feat = np.empty((n, 2, T2 * F, 4))
    feat[:, :, :, 0] = (Gr[:, 0] ** 2 + Gi[:, 0] ** 2)[:, None]
    feat[:, :, :, 1] = (Gr[:, 1] ** 2 + Gi[:, 1] ** 2)[:, None]
    feat[:, :, :, 2] = (2.0 * (Gr[:, 0] * Gr[:, 1] + Gi[:, 0] * Gi[:, 1]))[:, None]
    r_im = 2.0 * (Gi[:, 0] * Gr[:, 1] - Gr[:, 0] * Gi[:, 1])
    feat[:, 0, :, 3] = -r_im
    feat[:, 1, :, 3] = r_im
    Q = np.einsum("wl,nlj->njw", ph, U2[sel])                                                  # (n, 2, W)
    c01 = Q[:, 0] * Q[:, 1].conj()
    coef = np.stack([np.abs(Q[:, 0]) ** 2, np.abs(Q[:, 1]) ** 2, c01.real, c01.imag], axis=1)   # (n, 4, W)
    A2 = np.matmul(feat.reshape(n, T * F, 4), coef).reshape(n, T, F, W)
    np.maximum(A2, 0.0, out=A2)
    # direction from the map's own amplitudes (the deblurred ones grow near the Nyquist TF, where
    # the two directions cannot be told apart); speed from the deblurred ones along that direction
    t = np.argmax(A2.reshape(n, -1), axis=1) // (F * W)
    rr = np.arange(n)
    a_t = np.deg2rad(thetas[t])
    Ad = np.sqrt(A2[rr, t]) / np.abs(np.sinc(sfs[None, :] * np.cos(a_t)[:, None] * grid.dx_deg)
                           * np.sinc(sfs[None, :] * np.sin(a_t)[:, None] * grid.dy_deg))[:, :, None] \
        / deblur_t[None, None, :]
    fw = np.argmax(Ad.reshape(n, -1), axis=1)
    f, w = fw // W, fw % W
    # direction index of the map's energy along the axis, all SFs and TFs pooled (robust to where
    # the maximum falls; the blur factors are the same for both directions)
    energy = A2.reshape(n, T, F * W).sum(axis=2)
    e_pref = energy[rr, t]
    e_opp = energy[rr, (t + T2) % T]
    with np.errstate(invalid="ignore", divide="ignore"):
        out.dsi[c] = np.where(e_pref + e_opp > 0, (e_pref - e_opp) / (e_pref + e_opp), np.nan)
    insep = out.inseparable[c]
    out.direction_deg[c] = np.where(insep, thetas[t], np.nan)
    out.speed_deg_s[c] = np.where(insep, tfs[w] / sfs[f], np.nan)
    axis = np.where(insep, thetas[t], thetas[t] % 180.0)
    out.axis_deg[c] = axis
    # slices: the map summed across and along the axis, in bins of one pixel spacing around the centre
    a = np.deg2rad(axis)[:, None]
    dxs, dys = xs[None, :] - cx[sel, None], ys[None, :] - cy[sel, None]
    u = dxs * np.cos(a) + dys * np.sin(a)
    bb = -dxs * np.sin(a) + dys * np.cos(a)
    wts = np.where(win[sel][:, None, :], v[sel], 0.0)                                          # (n, L, P)
    base = (np.arange(n * L) * nb).reshape(n, L, 1)
    for arr, coord in ((out.slice_across, u), (out.slice_along, bb)):
        ib = np.clip(np.round(coord / d).astype(int) + nb // 2, 0, nb - 1)                    # (n, P)
        sl = np.bincount((base + ib[:, None, :]).ravel(), weights=wts.ravel(), minlength=n * L * nb)
        arr[c] = sl.reshape(n, L, nb)


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
