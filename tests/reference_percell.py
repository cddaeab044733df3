"""The per-cell implementations that map2d's vectorised code replaced, kept as test references.

``choose_maps`` and ``spike_latency`` (map2d.maps) and ``space_time`` (map2d.spacetime) loop over cells
(and, for the latency, over each cell's spikes); the library computes the same quantities for all cells
at once. The tests compare the two on small sessions (tests/test_vectorised.py). Copied unchanged from
the library as it was before the vectorisation, except the imports.
"""

from __future__ import annotations

import warnings

import numpy as np
import scipy.sparse as sp

from map2d.maps import LINEAR_SHARE_THRESHOLD, MapChoice, region_threshold_z
from map2d.contract import Spikes, SparseNoise
from map2d.maps import MapResult
from map2d.spacetime import _ALPHA, _NULL_DRAWS, INSEPARABLE_MAX, SpaceTime, spiked_power


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


def _both_maps(result: MapResult, c: int):
    """ON + OFF map of cell ``c`` over lags ``(L, P)``, and its z-map (the engine's, or with the null sd
    from the ON and OFF sds when the result holds no ON + OFF map)."""
    L = result.lag_frames.size
    if result.both is not None and result.both_z is not None:
        return (result.both[c].reshape(L, -1).astype(float), result.both_z[c].reshape(L, -1).astype(float))
    on, off = result.on[c].reshape(L, -1).astype(float), result.off[c].reshape(L, -1).astype(float)
    with np.errstate(invalid="ignore", divide="ignore"):
        sd_on = np.abs(on / result.on_z[c].reshape(L, -1))
        sd_off = np.abs(off / result.off_z[c].reshape(L, -1))
        both = on + off
        # ON and OFF means come from disjoint frames: their covariance (-s^2 / (F - 1)) is negligible
        z = both / np.sqrt(sd_on ** 2 + sd_off ** 2)
    return both, z


def _linear_power_share(lin, zlin, both, zboth, sel):
    """Noise-corrected share ``P_lin / (P_lin + P_both)`` over the elements ``sel`` (NaN if no signal)."""
    with np.errstate(invalid="ignore", divide="ignore"):
        p_lin = np.nansum(lin[sel] ** 2 - (lin[sel] / zlin[sel]) ** 2)
        p_both = np.nansum(both[sel] ** 2 - (both[sel] / zboth[sel]) ** 2)
    p_lin, p_both = max(float(p_lin), 0.0), max(float(p_both), 0.0)
    return p_lin / (p_lin + p_both) if p_lin + p_both > 0 else np.nan


def _separable(a, li):
    """Spatial singular vector of ``a`` (L, P), scaled to the projection of lag ``li`` on it."""
    _, _, vt = np.linalg.svd(a, full_matrices=False)
    u = vt[0]
    return u * float(a[li] @ u)


def choose_maps(result: MapResult, alpha: float | None = None) -> MapChoice:
    """Decide which map carries each responsive cell: the linear map or the ON + OFF map.

    The decision rests on the whole significant space-time region of the cell, never on one pixel:

    1. The region ``S``: every (lag, pixel) where the ON, OFF, linear or ON + OFF z-map reaches the
       corrected threshold :func:`region_threshold_z` for ``4 x lags x pixels`` tests at ``alpha``
       (the family-wise level of the responsive call). Under the null no element of a map reaches it
       with probability above ``alpha``.
    2. ``linear_share = P_lin / (P_lin + P_both)`` with ``P = sum_S (m^2 - sd^2)``, the signal power of
       the linear (ON - OFF) and ON + OFF maps over ``S``, each corrected for its noise power (``sd`` the
       null sd of the map element, so noise alone adds nothing on average). It lies in [0, 1]: about 0 for
       a cell that bright and dark spots excite at the same places (complex, ON-OFF: ``on ~ off``),
       0.5 for a half-wave rectified linear cell (``on = [k]+``, ``off = [-k]+``, so
       ``|on - off| = |on + off|``), 1 for a linear cell with a maintained discharge (``on = k``,
       ``off = -k``, ON + OFF near zero). For ON and OFF maps of equal norm and cosine similarity ``s``
       it is ``(1 - s) / 2``.
    3. The ON + OFF map carries the cell when ``linear_share < LINEAR_SHARE_THRESHOLD`` (0.25: ``s``
       above 0.5, the segregation criterion of Hubel & Wiesel 1962, as
       :data:`map2d.reconcile.OVERLAP_THRESHOLD`) and the ON + OFF map itself reaches the threshold;
       otherwise the linear map. A cell with a significant, segregated linear map therefore never goes
       to the ON + OFF map, whatever a stray pixel does.

    The spatial map is the first spatial singular vector of the chosen map over lags (a rank-1
    space-time separable fit), scaled to the projection of the peak lag on it; pooling lags this way
    raises the signal-to-noise ratio when a response spreads over two frames.

    Parameters
    ----------
    result : MapResult
        Sparse-noise maps (dense noise has only the linear map, which then carries every cell).
    alpha : float, optional
        Family-wise level of the regions (default: ``result.alpha``).

    Returns
    -------
    MapChoice
    """
    alpha = result.alpha if alpha is None else float(alpha)
    C = result.n_cells
    ny, nx = result.grid.shape
    P = ny * nx
    L = result.lag_frames.size
    shape = (C, ny, nx)
    spatial, linear_spatial, peak = np.full(shape, np.nan), np.full(shape, np.nan), np.full(shape, np.nan)
    zmap, noise = np.full(shape, np.nan), np.full(shape, np.nan)
    kind = np.full(C, "", dtype=object)
    share = np.full(C, np.nan)
    t_st = region_threshold_z(4 * L * P, alpha)
    for c in np.flatnonzero(result.peak_lag_index >= 0):
        li = int(result.peak_lag_index[c])
        lin_raw = result.linear[c].reshape(L, -1).astype(float)
        zlin = result.linear_z[c].reshape(L, -1).astype(float)
        lin = np.nan_to_num(lin_raw)
        peak[c] = lin[li].reshape(ny, nx)
        linear_spatial[c] = _separable(lin, li).reshape(ny, nx)
        chosen = "linear"
        if np.isfinite(result.on[c]).any():
            both, zboth = _both_maps(result, c)
            zon = result.on_z[c].reshape(L, -1).astype(float)
            zoff = result.off_z[c].reshape(L, -1).astype(float)
            zall = np.fmax(np.fmax(np.abs(zon), np.abs(zoff)), np.fmax(np.abs(zlin), np.abs(zboth)))
            sel = np.nan_to_num(zall) >= t_st
            ok = sel & np.isfinite(zlin) & np.isfinite(zboth) & (zlin != 0) & (zboth != 0)
            if ok.any():
                share[c] = _linear_power_share(lin_raw, zlin, both, zboth, ok)
                if share[c] < LINEAR_SHARE_THRESHOLD and np.nanmax(np.abs(zboth[ok])) >= t_st:
                    chosen = "on+off"
        kind[c] = chosen
        if chosen == "linear":
            spatial[c] = linear_spatial[c]
            z = zlin[li]
            m = lin_raw[li]
        else:
            spatial[c] = _separable(np.nan_to_num(both), li).reshape(ny, nx)
            z = zboth[li]
            m = both[li]
        zmap[c] = z.reshape(ny, nx)
        with np.errstate(invalid="ignore", divide="ignore"):
            sd = np.abs(m / z)
        sd = np.where(np.isfinite(sd) & (sd > 0), sd, np.nan)
        if np.isfinite(sd).any():
            sd = np.where(np.isfinite(sd), sd, np.nanmedian(sd))
        noise[c] = sd.reshape(ny, nx)
    return MapChoice(kind=kind, linear_share=share, spatial=spatial, linear_spatial=linear_spatial,
                     peak=peak, z=zmap, noise_sd=noise, threshold_z=region_threshold_z(P, alpha))


def spike_latency(spikes: Spikes, noise: SparseNoise, result: MapResult, bins_per_frame: int = 10,
                  z_min: float = 2.0) -> np.ndarray:
    """Response latency of each responsive cell at sub-frame resolution, from its spike times.

    ``peak_lag_s`` is a whole number of frames: lag ``l`` counts the spikes in the frame-long window
    ``[l T, (l + 1) T)`` after the onset of the stimulus frame, so it is the start of the window that
    holds most of the response and understates the latency by up to a frame. Spike times are finer:
    for every spike and every frame whose onset lies less than ``(L + 1) T`` before it, the delay
    ``tau = t_spike - onset`` falls in one of ``bins_per_frame`` bins per frame, and the frame's drive
    of the cell is added to that bin. The drive ``d_f`` is the sum, over the spots of frame ``f``, of the
    cell's ON map (bright spots) or OFF map (dark spots) at the peak lag, kept where that map is
    excitatory with ``z >= z_min``, centred over frames. ``h(tau)`` is then the spike-triggered mean
    drive at delay ``tau``: flat (zero on average) where the response does not depend on the stimulus,
    raised where spikes follow driving frames (reverse correlation at the resolution of the spike
    times; Chichilnisky 2001). The latency is the delay at which ``h`` (smoothed over 3 bins, weights
    1/4, 1/2, 1/4) first reaches half its maximum, going back from the maximum (linear interpolation
    between bin centres).

    Parameters
    ----------
    spikes : Spikes
    noise : SparseNoise
        The sparse-noise frames the maps came from.
    result : MapResult
        Maps of these spikes (:func:`compute_maps`).
    bins_per_frame : int
        Delay bins per frame (resolution ``T / bins_per_frame``).
    z_min : float
        Smallest z of a pixel whose spots count in the drive.

    Returns
    -------
    ndarray (C,)
        Latency in seconds; NaN for cells that are not responsive, for dense noise, and when the
        half-maximum cannot be found.
    """
    from map2d.align import cell_index

    if int(bins_per_frame) < 1:
        raise ValueError(f"bins_per_frame must be >= 1, got {bins_per_frame}")
    C = result.n_cells
    out = np.full(C, np.nan)
    cells = np.flatnonzero(result.peak_lag_index >= 0)
    if cells.size == 0 or result.stimulus != "sparse":
        return out
    onsets = np.asarray(noise.times_s, float)
    F = onsets.size
    T = float(np.median(np.diff(onsets))) if F > 1 else float(result.frame_s)
    L = int(result.lag_frames[-1]) + 1
    width = T / int(bins_per_frame)
    n_bins = L * int(bins_per_frame)
    flat = np.asarray(noise.frames).reshape(F, -1)
    f_idx, p_idx = np.nonzero(flat)
    bright = flat[f_idx, p_idx] > 0
    P = flat.shape[1]
    B = sp.csr_matrix((np.ones(f_idx.size, np.float32), (f_idx, np.where(bright, p_idx, p_idx + P))),
                      shape=(F, 2 * P))
    rows = cell_index(spikes)
    order = np.argsort(rows, kind="stable")
    bounds = np.searchsorted(rows[order], np.arange(C + 1))
    t_all = np.asarray(spikes.time_s, float)
    for c in cells:
        li = int(result.peak_lag_index[c])
        w = []
        for m, z in ((result.on, result.on_z), (result.off, result.off_z)):
            mm, zz = np.nan_to_num(m[c, li].ravel()), np.nan_to_num(z[c, li].ravel())
            w.append(np.where((zz >= z_min) & (mm > 0), mm, 0.0))
        w = np.concatenate(w)
        if not np.any(w > 0):
            continue
        d = np.asarray(B @ w, float)
        d -= d.mean()
        t = np.sort(t_all[order[bounds[c]:bounds[c + 1]]])
        k = np.searchsorted(onsets, t, side="right") - 1
        h = np.zeros(n_bins)
        for lag in range(L):
            f = k - lag
            ok = f >= 0
            tau = t[ok] - onsets[f[ok]]
            b = np.floor(tau / width).astype(np.int64)
            keep = (b >= 0) & (b < n_bins)
            h += np.bincount(b[keep], weights=d[f[ok]][keep], minlength=n_bins)[:n_bins]
        h = np.convolve(h, [0.25, 0.5, 0.25], mode="same")      # one noisy bin does not end the rise
        j = int(np.argmax(h))
        if not h[j] > 0:
            continue
        half = 0.5 * h[j]
        i = j
        while i > 0 and h[i - 1] >= half:
            i -= 1
        centre = (np.arange(n_bins) + 0.5) * width
        if i == 0:
            out[c] = centre[0] if h[0] >= half else np.nan
            continue
        a, b_ = h[i - 1], h[i]
        out[c] = centre[i - 1] + (half - a) / (b_ - a) * width
    return out


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
