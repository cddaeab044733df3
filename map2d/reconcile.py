"""Reconciliation: the spatial map and the grating responses predict each other.

For a linear cell with spatial kernel ``k(x, y)`` the response to a static grating of orientation ``ori``,
spatial frequency ``sf``, phase ``phi`` and contrast ``c`` is ``c Re(H exp(i phi))``, where ``H`` is the
kernel's Fourier sum at the grating's wave vector in the convention of :mod:`map2d.geometry`
(Enroth-Cugell & Robson 1966; Hochstein & Shapley 1976). The first harmonic over phase of the measured
responses is therefore ``H`` itself, up to one positive gain, and the map and the gratings are two views
of one thing:

- forward: the map predicts the complex grating surface (:func:`predict_gratings`,
  :func:`pixel_box_transfer`, :func:`forward_agreement`, corrected for the measurement's noise);
- inverse: the grating surface predicts the map, band-limited to the frequencies the gratings covered
  (:func:`inverse_map`, :func:`band_limit`, :func:`inverse_comparison`);
- area summation: the map predicts disk and annulus responses (:func:`size_tuning`);
- where the two views disagree the cell is not linear (:func:`linearity_call`).

References
----------
Enroth-Cugell C, Robson JG (1966) The contrast sensitivity of retinal ganglion cells of the cat.
J Physiol 187:517-552.
Hochstein S, Shapley RM (1976) Quantitative analysis of retinal ganglion cell classifications.
J Physiol 262:237-264.
Hubel DH, Wiesel TN (1962) Receptive fields, binocular interaction and functional architecture in the
cat's visual cortex. J Physiol 160:106-154.
Skottun BC, De Valois RL, Grosof DH, Movshon JA, Albrecht DG, Bonds AB (1991) Classifying simple and
complex cells on the basis of response modulation. Vision Res 31:1079-1086.
Bracewell RN (2000) The Fourier Transform and Its Applications, 3rd ed. McGraw-Hill.
Satterthwaite FE (1946) An approximate distribution of estimates of variance components.
Biometrics Bull 2:110-114.
Spearman C (1904) The proof and measurement of association between two things. Am J Psychol 15:72-101.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .geometry import Grid
from .spectral import (dog_spectrum_at, fourier_at, gabor_spectrum, gaussian_spectrum, inverse_fourier,
                       nyquist_mask, orientation_period, polar_area_weights)

__all__ = [
    "predict_gratings",
    "predict_from_fits",
    "time_course_sign",
    "forward_prediction",
    "predict_static_responses",
    "forward_agreement",
    "inverse_map",
    "band_limit",
    "map_similarity",
    "InverseComparison",
    "inverse_comparison",
    "size_tuning",
    "linearity_call",
    "AGREEMENT_THRESHOLD",
    "F1_F0_THRESHOLD",
    "OVERLAP_THRESHOLD",
    "MIN_CONDITIONS",
    "SIGNAL_ALPHA",
    "pixel_box_transfer",
    "local_angle_columns",
    "LOCAL_ANGLE_COLUMNS",
]

#: Forward agreement at or above which the map and the gratings are called consistent (ours: halfway
#: between the >= 0.8 of linear and the <= 0.3 of phase-invariant model cells).
AGREEMENT_THRESHOLD = 0.5
#: F1/F0 above which a cell is called simple (Skottun et al. 1991).
F1_F0_THRESHOLD = 1.0
#: ON/OFF overlap (0 = segregated subregions, 1 = coextensive) above which ON and OFF subregions are
#: called overlapping, against the Hubel & Wiesel (1962) simple-cell criterion (threshold ours).
OVERLAP_THRESHOLD = 0.5
#: Fewest valid grating conditions for which an agreement is computed.
MIN_CONDITIONS = 3
#: Level of the test that a measured grating surface holds a first harmonic beyond its noise, below
#: which the agreement is corrected for that noise (:func:`forward_agreement`).
SIGNAL_ALPHA = 0.001


# ----------------------------------------------------------------------------------------------------
# forward prediction
# ----------------------------------------------------------------------------------------------------

def predict_gratings(maps, grid: Grid, orientations_deg, sfs_cpd, origin_deg=None, outer=True):
    """Complex grating responses predicted from spatial maps (the forward prediction).

    Parameters
    ----------
    maps : array_like, shape (ny, nx) or (C, ny, nx)
        Spatial maps (e.g. the linear map at the peak lag), row 0 at the top.
    grid : Grid
        The sparse-noise grid the maps live on.
    orientations_deg, sfs_cpd : array_like
        With ``outer=True`` (default) the 1-D axes ``(O,)`` and ``(S,)`` of an orientation x SF grid;
        with ``outer=False`` paired arrays ``(K,)`` listing the wave vectors actually shown.
    origin_deg : (float, float), optional
        The gratings' phase origin; default the grid centre (contract).

    Returns
    -------
    numpy.ndarray, complex, shape (..., O, S) or (..., K)
        ``H`` at every wave vector (:func:`map2d.spectral.fourier_at`): the linear prediction of the
        first harmonic over phase of the responses, per unit contrast.
    """
    ori = np.asarray(orientations_deg, float)
    sf = np.asarray(sfs_cpd, float)
    if outer:
        if ori.ndim != 1 or sf.ndim != 1:
            raise ValueError("with outer=True, orientations_deg and sfs_cpd must be 1-D axes")
        return fourier_at(maps, grid, ori[:, None], sf[None, :], origin_deg)
    if ori.shape != sf.shape:
        raise ValueError(f"with outer=False, orientations_deg {ori.shape} and sfs_cpd {sf.shape} "
                         "must have the same shape")
    return fourier_at(maps, grid, ori, sf, origin_deg)


def _col(fits, name, n):
    v = fits.get(name) if hasattr(fits, "get") else None
    if v is None:
        return np.full(n, np.nan)
    a = np.array([np.nan if x is None or x == "" else x for x in np.asarray(v, object).ravel()], float)
    return a if a.size == n else np.full(n, np.nan)


def predict_from_fits(fits, orientations_deg, sfs_cpd, origin_deg, outer=True):
    """Complex grating responses predicted from the closed-form spectra of fitted kernels.

    The forward prediction of :func:`predict_gratings` sums a map sampled on the sparse-noise grid, so
    beyond the grid's Nyquist band (``|kx| dx > 1/2`` or ``|ky| dy > 1/2``) it returns the mirror image
    of the spectrum, not the spectrum (aliasing): on 4-deg pixels a Gabor of 0.08 cpd, sampled without
    noise, predicts ``|H|`` 36 at 0.16 cpd where its transform is 0.1. A fitted model is a function of
    the continuous plane, and its transform has a closed form (Gaussian pair, shift and modulation
    theorems; Bracewell 2000): :func:`map2d.spectral.gaussian_spectrum`,
    :func:`map2d.spectral.dog_spectrum_at`, :func:`map2d.spectral.gabor_spectrum`. With the kernel's
    parameters (the pixel box already removed from the fit, :func:`map2d.fit.spatial.remove_pixel_box`)
    this is what the gratings see, at any SF, with the box handled once.

    Parameters
    ----------
    fits : mapping of column name -> array (C,)
        The columns of :func:`map2d.fit.spatial.fit_maps` (``model``, ``center_x_deg``,
        ``center_y_deg``, ``amplitude``, ``sigma_major_deg``, ``sigma_minor_deg``, ``theta_deg``,
        ``dog_kc``, ``rc_deg``, ``dog_ks``, ``rs_deg``, ``gabor_*``).
    orientations_deg, sfs_cpd : array_like
        As in :func:`predict_gratings`.
    origin_deg : (float, float)
        The gratings' phase origin.

    Returns
    -------
    numpy.ndarray, complex, shape (C, O, S) or (C, K)
        NaN for a cell without a model or with a missing parameter (a rejected or unresolved fit
        gives no prediction, never an invented one).

    Examples
    --------
    >>> f = {"model": ["gaussian"], "center_x_deg": [0.0], "center_y_deg": [0.0], "amplitude": [1.0],
    ...      "sigma_major_deg": [1.0], "sigma_minor_deg": [1.0], "theta_deg": [0.0]}
    >>> h = predict_from_fits(f, [0.0], [0.0], (0.0, 0.0))
    >>> bool(np.isclose(h[0, 0, 0], 2 * np.pi))
    True
    """
    model = np.asarray(fits.get("model", []), object).ravel()
    n = model.size
    ori = np.asarray(orientations_deg, float)
    sf = np.asarray(sfs_cpd, float)
    if outer:
        if ori.ndim != 1 or sf.ndim != 1:
            raise ValueError("with outer=True, orientations_deg and sfs_cpd must be 1-D axes")
        o, f = ori[None, :, None], sf[None, None, :]
        shape = (n, ori.size, sf.size)
    else:
        if ori.shape != sf.shape:
            raise ValueError(f"with outer=False, orientations_deg {ori.shape} and sfs_cpd {sf.shape} "
                             "must have the same shape")
        o, f = ori[None], sf[None]
        shape = (n,) + ori.shape
    origin = tuple(np.asarray(origin_deg, float).ravel())
    out = np.full(shape, np.nan + 0j)
    col = {k: _col(fits, k, n) for k in (
        "center_x_deg", "center_y_deg", "amplitude", "sigma_major_deg", "sigma_minor_deg", "theta_deg",
        "dog_kc", "rc_deg", "dog_ks", "rs_deg", "gabor_orientation_deg", "gabor_sf_cpd", "gabor_phase_deg",
        "gabor_sigma_u_deg", "gabor_sigma_v_deg")}
    extra = (None,) * (len(shape) - 1)

    def c(name, sel):
        return col[name][sel][(slice(None),) + extra]

    for kind in ("gaussian", "dog", "gabor"):
        sel = model == kind
        if not sel.any():
            continue
        x0, y0 = c("center_x_deg", sel), c("center_y_deg", sel)
        if kind == "gaussian":
            h = gaussian_spectrum(o, f, x0, y0, c("sigma_major_deg", sel), c("sigma_minor_deg", sel),
                                  c("theta_deg", sel), c("amplitude", sel), origin)
        elif kind == "dog":
            h = dog_spectrum_at(o, f, x0, y0, c("dog_kc", sel), c("rc_deg", sel), c("dog_ks", sel),
                                c("rs_deg", sel), origin)
        else:
            h = gabor_spectrum(o, f, x0, y0, c("gabor_sigma_u_deg", sel), c("gabor_sigma_v_deg", sel),
                               c("gabor_orientation_deg", sel), c("gabor_sf_cpd", sel),
                               c("gabor_phase_deg", sel), c("amplitude", sel), origin)
        out[sel] = np.broadcast_to(h, (int(sel.sum()),) + shape[1:])
    return out


def forward_prediction(fits, use_fit, sampled_maps, grid: Grid, orientations_deg, sfs_cpd, origin_deg=None):
    """The forward prediction of a flashed (orientation x SF) surface, and the sampled-map diagnostic.

    Where ``use_fit`` and the fit's parameters are finite: the closed-form spectrum of the fitted
    kernel (:func:`predict_from_fits`), valid at any SF. Elsewhere (e.g. a map that is not fitted as a
    linear kernel, or a width the pixel box leaves unresolved): the Fourier sum of the sampled map
    divided by the pixel box's transfer (:func:`predict_gratings`, :func:`pixel_box_transfer`), but
    only inside the grid's Nyquist band (:func:`map2d.spectral.nyquist_mask`); beyond it NaN (no
    prediction), since a sampled map cannot tell a frequency from its mirror image there.

    Parameters
    ----------
    fits : mapping of column -> array (C,)
        :func:`map2d.fit.spatial.fit_maps` columns (kernel parameters, pixel box removed).
    use_fit : array_like of bool (C,)
        Cells whose fit is a model of the linear kernel.
    sampled_maps : array_like (C, ny, nx)
        The maps to sum where no closed form is used (NaN: no prediction).
    grid, orientations_deg, sfs_cpd, origin_deg
        As in :func:`predict_gratings`.

    Returns
    -------
    predicted : numpy.ndarray complex (C, O, S)
    sampled : numpy.ndarray complex (C, O, S)
        The sampled-map prediction everywhere, NaN beyond the Nyquist band (a diagnostic).
    """
    ori = np.asarray(orientations_deg, float)
    sf = np.asarray(sfs_cpd, float)
    if origin_deg is None:
        origin_deg = (float(grid.center_x_deg), float(grid.center_y_deg))
    m = np.asarray(sampled_maps, float)
    box = pixel_box_transfer(grid, ori[:, None], sf[None, :], min_value=0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        sampled = predict_gratings(np.nan_to_num(m), grid, ori, sf, origin_deg) / box
    bad = ~np.all(np.isfinite(m), axis=(-2, -1))
    sampled[bad] = np.nan
    inside = nyquist_mask(grid, ori[:, None], sf[None, :])
    sampled = np.where(inside[None], sampled, np.nan)
    closed = predict_from_fits(fits, ori, sf, origin_deg)
    use = np.asarray(use_fit, bool).ravel()[:, None, None] & np.all(np.isfinite(closed), axis=(1, 2),
                                                                     keepdims=True)
    return np.where(use, closed, sampled), sampled


def time_course_sign(map_course, map_lags_s, grating_course, grating_lags_s):
    """Sign relation (+1 / -1) between the time courses of the two experiments, lag by lag.

    Each experiment reduces its responses over lags to one spatial (or spectral) pattern times a time
    course, and takes the pattern's sign from its own time course (the map from the peak lag of its
    ``|z|``, the gratings from the largest lobe of their temporal profile). For a biphasic response
    whose dominant lobe differs between the two (lobes +1 / -0.8 for spots and +0.8 / -1 for
    gratings) the two patterns then have opposite signs although the cell is the same. Compared at
    the same latencies the time courses say which: ``sign(sum_t m(t) g(t))`` over the grating lags
    ``t`` inside the map's lag range, ``m`` linearly interpolated from the map's lags (the two
    experiments may use different frame rates). Multiplying the measured grating surface by this
    sign refers both to the same latency.

    Parameters
    ----------
    map_course : array_like (C, Lm)
        The map's time course relative to its spatial pattern (1 at the lag the pattern comes from).
    map_lags_s : array_like (Lm,)
    grating_course : array_like (C, Lg)
        The gratings' temporal profile (``FlashedResult.temporal_profile``).
    grating_lags_s : array_like (Lg,)

    Returns
    -------
    numpy.ndarray (C,)
        +1 or -1; +1 where the time courses do not overlap or their product sums to 0.

    Examples
    --------
    >>> time_course_sign([[0, 1.0, -0.8]], [0, 0.1, 0.2], [[0, -0.8, 1.0]], [0, 0.1, 0.2]).tolist()
    [-1.0]
    """
    m = np.atleast_2d(np.asarray(map_course, float))
    g = np.atleast_2d(np.asarray(grating_course, float))
    tm = np.asarray(map_lags_s, float).ravel()
    tg = np.asarray(grating_lags_s, float).ravel()
    if m.shape[0] != g.shape[0]:
        raise ValueError(f"map_course {m.shape} and grating_course {g.shape} must have one row per cell")
    inside = (tg >= tm.min() - 1e-9) & (tg <= tm.max() + 1e-9)
    out = np.ones(m.shape[0])
    for c in range(m.shape[0]):  # C small; interpolation per cell
        mi = np.interp(tg[inside], tm, np.nan_to_num(m[c]))
        s = float(np.sum(mi * np.nan_to_num(g[c, inside])))
        if s < 0:
            out[c] = -1.0
    return out


def predict_static_responses(maps, grid: Grid, orientation_deg, sf_cpd, phase_deg, contrast=1.0,
                             origin_deg=None):
    """Linear response of spatial maps to individual static gratings.

    ``r = contrast Re(H exp(i phase))`` with ``H`` the Fourier sum at the grating's wave vector: the dot
    product of the map with the contract's grating image, times the pixel area.

    Parameters
    ----------
    maps : array_like, shape (..., ny, nx)
    grid : Grid
    orientation_deg, sf_cpd, phase_deg, contrast : array_like
        Broadcast together to the shape ``N`` of the presentations.
    origin_deg : (float, float), optional

    Returns
    -------
    numpy.ndarray, shape (..., *N)
    """
    ori, sf, ph, c = np.broadcast_arrays(*(np.asarray(v, float) for v in
                                          (orientation_deg, sf_cpd, phase_deg, contrast)))
    h = fourier_at(maps, grid, ori, sf, origin_deg)
    return c * np.real(h * np.exp(1j * np.deg2rad(ph)))


def _cells_last(a, name):
    a = np.asarray(a)
    if a.ndim == 0:
        raise ValueError(f"{name} must have at least one dimension")
    single = a.ndim == 1
    a2 = a.reshape(1, -1) if single else a.reshape(a.shape[0], -1)
    return a2, single


def forward_agreement(predicted, measured, min_conditions=MIN_CONDITIONS, noise_var=None,
                      alpha=SIGNAL_ALPHA, signal_p=None):
    """How well the map's predicted grating surface matches the measured one.

    Parameters
    ----------
    predicted : array_like, complex, shape (C, ...) or (K,)
        Predicted first harmonics ``H`` per cell (:func:`predict_gratings`); leading axis = cells, the
        remaining axes (e.g. orientation x SF) are the conditions. A 1-D input is one cell.
    measured : array_like, complex, same shape
        Measured first harmonics over phase in the same convention (response per unit contrast).
        NaN marks a condition that was not measured; it is left out.
    min_conditions : int
        Fewest valid conditions (finite in both) needed; otherwise every output is NaN.
    noise_var : array_like, same shape as ``measured``, optional
        Noise variance ``E|e|^2`` of each measured value (e.g. :func:`map2d.analysis.flashed_noise`).
        Given, the ``agreement`` is corrected for the noise of the measured surface (below). A
        condition whose variance is NaN takes the mean of the others.
    alpha : float
        Level of the test that the measured surface holds more than noise (below).
    signal_p : array_like, shape (C,), optional
        A p-value of that test computed elsewhere, used instead of the chi-square below (with
        ``noise_var``): :func:`map2d.analysis.flashed_signal_p`, whose null includes the choice of the
        temporal profile that pooled the lags of ``measured`` (the chi-square takes the surface's
        weights as fixed and, for surfaces pooled with a profile taken from the same data, rejects
        too often). NaN for a cell keeps the chi-square.

    Returns
    -------
    dict of numpy.ndarray, each of shape (C,) (0-d for a 1-D input)
        ``gain``
            The one real gain ``g`` minimising ``sum |meas - g pred|^2``:
            ``sum Re(conj(pred) meas) / sum |pred|^2``, with its sign. Real because the phase of a
            linear cell's first harmonic is fixed by the kernel and the phase origin (a complex gain
            would forgive any phase error). Not clipped at 0: the sign relation between the two
            experiments is reported, not hidden (refer the two time courses to the same latency first,
            :func:`time_course_sign`; a negative gain then says that map and gratings answer with
            opposite signs at the same latency, which :func:`linearity_call` counts against
            linearity). No offset is fitted: the first harmonic over phase contains no constant term
            (the phase-invariant part goes to the mean response, not to ``H``).
        ``agreement_raw``
            Explained variance of the measured complex surface, ``1 - sum |meas - g pred|^2 /
            sum |meas|^2`` in [0, 1]. The reference is zero, not the surface mean: a cell with no linear
            component has a first harmonic of zero at every wave vector. With the least-squares gain this
            equals ``c^2``, ``c = sum Re(conj(pred) meas) / (||pred|| ||meas||)``, the squared cosine
            between the two surfaces as real vectors (the sign of ``c`` is the sign of ``gain``).
            Noise in the measured surface
            lowers it even for a perfect prediction: its expectation is then ``P / (P + N)``, with
            ``P`` the signal and ``N = sum noise_var`` the noise power of the surface.
        ``agreement``
            Without ``noise_var``: ``agreement_raw``. With it, the explained share of the *signal*
            power of the measured surface, i.e. the agreement the same prediction would reach against
            a noiseless measurement (the correction for attenuation of a squared correlation, Spearman
            1904, with the noise measured rather than modelled)::

                (pm^2 / pp - sum |pred|^2 noise_var / (2 pp)) / (mm - N),   clipped to [0, 1],

            where ``pm^2 / pp`` is the power the fitted prediction explains, the subtracted term is its
            expected share of the noise (circular complex noise: half of ``noise_var`` per real
            direction) and ``mm - N`` the signal power. Applied only when the measured surface holds
            significant power beyond its noise (``signal_p < alpha``); otherwise its signal power is
            indistinguishable from zero, the ratio undefined, and ``agreement`` is the raw score (about
            ``1 / (2 K)`` for a surface of pure noise over ``K`` conditions). A phase-invariant (complex)
            cell has no first harmonic, so it keeps a near-zero raw score; a linear cell measured with
            noise is no longer penalised for it.
        ``signal_fraction``
            ``1 - N / mm``: the share of the measured surface's power that is signal (NaN without
            ``noise_var``).
        ``signal_p``
            P-value of the measured power ``mm`` against the noise alone. Under the null (no first
            harmonic) with circular Gaussian noise, ``|e_k|^2`` is exponential with mean ``v_k``
            (``noise_var``), so ``mm`` has mean ``N`` and variance ``sum v_k^2``; it is referred to the
            scaled chi-square with the same two moments (Satterthwaite 1946): ``mm / c ~ chi2(nu)``,
            ``c = sum v_k^2 / (2 N)``, ``nu = 2 N^2 / sum v_k^2`` (``nu = 2 K`` for equal variances; fewer
            when a few strongly driven conditions carry most of the noise). The noise variances are taken
            as known: estimate them with many degrees of freedom (e.g. from the spread of single
            presentations, :func:`map2d.analysis.flashed_noise`). NaN without ``noise_var``.
        ``noise_corrected``
            bool: whether ``agreement`` is the corrected score.
        ``magnitude_agreement``
            Explained variance of ``|meas|`` by a gain and an offset on ``|pred|``: the squared Pearson
            correlation of the magnitudes, 0 when the correlation is negative. An offset is fitted here
            because measured magnitudes carry a positive noise floor.
        ``phase_error_deg``
            Mean absolute phase difference ``|arg(meas conj(pred))|`` in degrees (0-180), weighted by
            ``|meas| |pred|`` so that conditions where both surfaces are strong count most.
        ``n_conditions``
            Number of valid conditions used (int).

    Examples
    --------
    >>> h = np.array([[1 + 1j, 2.0, -1j, 0.5]])
    >>> r = forward_agreement(h, 3 * h)
    >>> float(r["gain"][0]), float(r["agreement"][0]), float(r["phase_error_deg"][0])
    (3.0, 1.0, 0.0)
    """
    p, single = _cells_last(np.asarray(predicted, complex), "predicted")
    m, _ = _cells_last(np.asarray(measured, complex), "measured")
    if np.shape(predicted) != np.shape(measured):
        raise ValueError(f"predicted {np.shape(predicted)} and measured {np.shape(measured)} "
                         "must have the same shape")
    valid = np.isfinite(p) & np.isfinite(m)
    n = valid.sum(axis=1)
    p0 = np.where(valid, p, 0)
    m0 = np.where(valid, m, 0)
    pp = np.sum(np.abs(p0) ** 2, axis=1)
    mm = np.sum(np.abs(m0) ** 2, axis=1)
    pm = np.sum(np.real(np.conj(p0) * m0), axis=1)
    ok = (n >= max(1, int(min_conditions))) & (pp > 0) & (mm > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        gain = np.where(ok, pm / pp, np.nan)
        sse = mm - 2 * gain * pm + gain**2 * pp
        agreement = np.where(ok, np.clip(1.0 - sse / mm, 0.0, 1.0), np.nan)

        # magnitudes: Pearson correlation over the valid conditions
        a = np.where(valid, np.abs(m0), np.nan)
        b = np.where(valid, np.abs(p0), np.nan)
        a = a - np.nanmean(np.where(ok[:, None], a, 0.0), axis=1, keepdims=True)
        b = b - np.nanmean(np.where(ok[:, None], b, 0.0), axis=1, keepdims=True)
        sab = np.nansum(a * b, axis=1)
        saa = np.nansum(a * a, axis=1)
        sbb = np.nansum(b * b, axis=1)
        r = sab / np.sqrt(saa * sbb)
        mag_ok = ok & (saa > 0) & (sbb > 0)
        magnitude = np.where(mag_ok, np.maximum(r, 0.0) ** 2, np.nan)

        w = np.abs(m0) * np.abs(p0)
        dphi = np.abs(np.angle(m0 * np.conj(p0), deg=True))
        sw = w.sum(axis=1)
        phase_err = np.where(ok & (sw > 0), np.sum(w * dphi, axis=1) / sw, np.nan)
    raw = agreement
    nan_c = np.full(raw.shape, np.nan)
    given_p = signal_p
    signal_fraction, signal_p, corrected = nan_c.copy(), nan_c.copy(), np.zeros(raw.shape, bool)
    if noise_var is not None:
        from scipy.stats import chi2
        v, _ = _cells_last(np.asarray(noise_var, float), "noise_var")
        if np.shape(noise_var) != np.shape(measured):
            raise ValueError(f"noise_var {np.shape(noise_var)} must have the shape of measured "
                             f"{np.shape(measured)}")
        nvalid = valid & np.isfinite(v) & (v >= 0)
        v0 = np.where(nvalid, v, 0.0)
        # conditions whose noise could not be estimated take the mean noise of the others
        nn = nvalid.sum(axis=1)
        with np.errstate(divide="ignore", invalid="ignore"):
            mean_v = np.where(nn > 0, v0.sum(axis=1) / np.maximum(nn, 1), np.nan)
            v_use = np.where(nvalid, v0, np.where(valid, mean_v[:, None], 0.0))
            big_n = v_use.sum(axis=1)
            n_ok = ok & (nn >= max(1, int(min_conditions))) & (big_n > 0)
            signal_fraction = np.where(n_ok, 1.0 - big_n / mm, np.nan)
            v2 = np.sum(v_use**2, axis=1)
            scale = np.where(n_ok & (v2 > 0), v2 / (2 * np.where(n_ok, big_n, 1.0)), 1.0)
            nu = np.where(n_ok & (v2 > 0), 2 * big_n**2 / np.where(v2 > 0, v2, 1.0), 1.0)
            signal_p_chi2 = np.where(n_ok, chi2.sf(mm / scale, nu), np.nan)
            if given_p is None:
                signal_p = signal_p_chi2
            else:
                given = np.asarray(given_p, float).ravel()
                if given.size != signal_p_chi2.size:
                    raise ValueError(f"signal_p must have one value per cell ({signal_p_chi2.size}), "
                                     f"got {given.size}")
                signal_p = np.where(n_ok, np.where(np.isfinite(given), given, signal_p_chi2), np.nan)
            explained = pm**2 / np.where(pp > 0, pp, 1.0) - np.sum(np.abs(p0) ** 2 * v_use, axis=1) / (2 * pp)
            signal = mm - big_n
            corrected = n_ok & (signal_p < alpha) & (signal > 0)
            nc = np.clip(explained / np.where(corrected, signal, 1.0), 0.0, 1.0)
        agreement = np.where(corrected, nc, raw)
    out = {"gain": gain, "agreement": agreement, "agreement_raw": raw, "signal_fraction": signal_fraction,
           "signal_p": signal_p, "noise_corrected": corrected, "magnitude_agreement": magnitude,
           "phase_error_deg": phase_err, "n_conditions": n.astype(int)}
    if single:
        out = {k: v[0] if k in ("n_conditions", "noise_corrected") else np.asarray(v[0])
               for k, v in out.items()}
    return out


def pixel_box_transfer(grid: Grid, orientations_deg, sfs_cpd, min_value=0.5):
    """Transfer function of the pixel box at grating wave vectors: ``sinc(kx dx) sinc(ky dy)``.

    A sparse-noise map is the kernel averaged over each pixel, so its Fourier sum at a wave vector is
    the kernel's ``H`` times this factor (numpy's normalised ``sinc``; the transform of a box of width
    ``dx``, Bracewell 2000), while a grating drives the kernel itself. Dividing a prediction from the map
    by it predicts what the gratings see. Where the factor falls below ``min_value`` (around 0.6 cycles
    per pixel, beyond the grid's Nyquist limit, where the map cannot predict anyway) the factor is set to
    1 (no correction) rather than amplify aliased noise.

    Parameters
    ----------
    grid : Grid
    orientations_deg, sfs_cpd : array_like
        Broadcast together (e.g. ``ori[:, None]`` and ``sf[None, :]``).
    min_value : float

    Returns
    -------
    numpy.ndarray, float

    Examples
    --------
    >>> g = Grid(ny=4, nx=4, center_x_deg=0.0, center_y_deg=0.0, dx_deg=2.0, dy_deg=2.0)
    >>> round(float(pixel_box_transfer(g, 0.0, 0.25)), 4)   # half a cycle per pixel: sin(pi/2)/(pi/2)
    0.6366
    """
    from .geometry import wave_vector
    kx, ky = wave_vector(np.asarray(orientations_deg, float), np.asarray(sfs_cpd, float))
    t = np.sinc(np.asarray(kx) * grid.dx_deg) * np.sinc(np.asarray(ky) * grid.dy_deg)
    return np.where(t >= min_value, t, 1.0)


# ----------------------------------------------------------------------------------------------------
# inverse prediction
# ----------------------------------------------------------------------------------------------------

def inverse_map(measured, orientations_deg, sfs_cpd, grid: Grid, origin_deg=None, sf_axis="auto"):
    """Spatial map predicted from complex grating responses (the inverse prediction).

    The inverse of the convention's transform is ``k(x) = integral H(f) exp(-i 2 pi f . (x - xc)) d^2f``
    (Bracewell 2000). Over the polar orientation x SF grid, with area weights ``w`` from
    :func:`map2d.spectral.polar_area_weights`, and with ``H(-f) = conj H(f)`` for a real map when the
    orientations cover only half of the plane (0-180 deg), this is the weighted sum of cosine gratings

        ``k(x) ~ 2 sum_{o,s} w_os Re(H_os exp(-i 2 pi k_os . (x - xc)))``

    (factor 1 instead of 2 when the orientations cover 0-360 deg). The result contains only the
    frequencies inside the band the gratings covered.

    Parameters
    ----------
    measured : array_like, complex, shape (..., O, S)
        First harmonics over phase (response per unit contrast, :mod:`map2d.geometry` convention).
    orientations_deg : array_like, shape (O,)
    sfs_cpd : array_like, shape (S,)
    grid : Grid
        Grid on which to evaluate the map.
    origin_deg : (float, float), optional
        The phase origin of the measured responses; default the grid centre.
    sf_axis : {"auto", "log", "linear"}
        Passed to :func:`map2d.spectral.polar_area_weights`.

    Returns
    -------
    numpy.ndarray, shape (..., ny, nx)
        The predicted map; all NaN for a cell with any missing (NaN) condition, or when the grid of
        gratings has a single orientation or SF (the area weights cannot be estimated).
    """
    ori = np.asarray(orientations_deg, float).ravel()
    sf = np.asarray(sfs_cpd, float).ravel()
    h = np.asarray(measured, complex)
    if h.ndim < 2 or h.shape[-2:] != (ori.size, sf.size):
        raise ValueError(f"measured must have shape (..., {ori.size}, {sf.size}) "
                         f"(orientations x SFs), got {h.shape}")
    w = polar_area_weights(ori, sf, sf_axis=sf_axis)
    factor = 360.0 / orientation_period(ori)
    bad = ~np.all(np.isfinite(h), axis=(-2, -1))
    coeff = np.where(np.isfinite(h), h, 0) * w
    if not np.all(np.isfinite(w)):
        coeff = np.zeros_like(coeff)
        bad = np.ones(h.shape[:-2], bool)
    k = factor * np.real(inverse_fourier(coeff, grid, ori[:, None], sf[None, :], origin_deg))
    k[bad] = np.nan
    return k


def band_limit(maps, grid: Grid, orientations_deg, sfs_cpd, origin_deg=None, sf_axis="auto"):
    """Limit spatial maps to the frequency band covered by an orientation x SF grid of gratings.

    Defined as forward then inverse on the same polar grid:
    ``inverse_map(predict_gratings(maps, ...), ...)``. So the inverse prediction of a perfectly linear
    cell equals, up to its gain, the band-limited map by construction, and any difference between
    :func:`inverse_map` of the measured surface and this map is a difference in the data. The phase
    origin cancels; it is accepted only for symmetry.

    Parameters
    ----------
    maps : array_like, shape (..., ny, nx)
    grid : Grid
    orientations_deg, sfs_cpd : array_like, 1-D
    origin_deg, sf_axis
        As in :func:`inverse_map`.

    Returns
    -------
    numpy.ndarray, shape (..., ny, nx)
    """
    h = predict_gratings(maps, grid, orientations_deg, sfs_cpd, origin_deg)
    return inverse_map(h, orientations_deg, sfs_cpd, grid, origin_deg, sf_axis=sf_axis)


def map_similarity(a, b):
    """Pearson correlation between maps, over the pixels finite in both.

    Parameters
    ----------
    a, b : array_like, shape (..., ny, nx)

    Returns
    -------
    numpy.ndarray, shape (...)
        Correlation in [-1, 1]; NaN when fewer than 3 pixels are finite in both or either map is flat.

    Examples
    --------
    >>> x = np.arange(12.0).reshape(3, 4)
    >>> float(map_similarity(x, 2 * x + 1)), float(map_similarity(x, -x))
    (1.0, -1.0)
    """
    a = np.asarray(a, float)
    b = np.asarray(b, float)
    if a.shape != b.shape or a.ndim < 2:
        raise ValueError(f"maps must have the same shape (..., ny, nx), got {a.shape} and {b.shape}")
    valid = np.isfinite(a) & np.isfinite(b)
    n = valid.sum(axis=(-2, -1))
    with np.errstate(invalid="ignore", divide="ignore"):
        a0 = np.where(valid, a, 0.0)
        b0 = np.where(valid, b, 0.0)
        ma = a0.sum(axis=(-2, -1), keepdims=True) / np.maximum(n, 1)[..., None, None]
        mb = b0.sum(axis=(-2, -1), keepdims=True) / np.maximum(n, 1)[..., None, None]
        da = np.where(valid, a0 - ma, 0.0)
        db = np.where(valid, b0 - mb, 0.0)
        saa = np.sum(da * da, axis=(-2, -1))
        sbb = np.sum(db * db, axis=(-2, -1))
        sab = np.sum(da * db, axis=(-2, -1))
        r = sab / np.sqrt(saa * sbb)
        scale = np.maximum(np.max(np.abs(a0), axis=(-2, -1)) ** 2, 1e-300) * n
        flat = (saa <= 1e-24 * scale) | (sbb <= 1e-24 * np.maximum(
            np.max(np.abs(b0), axis=(-2, -1)) ** 2, 1e-300) * n)
    return np.where((n >= 3) & ~flat, np.clip(r, -1.0, 1.0), np.nan)


@dataclass
class InverseComparison:
    """Both maps of the inverse prediction and their similarity, for the report.

    Attributes
    ----------
    from_gratings : numpy.ndarray, shape (C, ny, nx)
        The map predicted from the measured grating responses (:func:`inverse_map`), in response units
        per unit contrast times deg^2 / deg^2 (i.e. the gratings' units).
    from_map : numpy.ndarray, shape (C, ny, nx)
        The measured map limited to the same band (:func:`band_limit`), in the map's units.
    similarity : numpy.ndarray, shape (C,)
        :func:`map_similarity` of the two (scale-free, so the different units do not matter).
    """

    from_gratings: np.ndarray
    from_map: np.ndarray
    similarity: np.ndarray


def inverse_comparison(measured, maps, grid: Grid, orientations_deg, sfs_cpd, origin_deg=None,
                       sf_axis="auto") -> InverseComparison:
    """The map predicted from the gratings beside the band-limited measured map.

    Parameters
    ----------
    measured : array_like, complex, shape (C, O, S)
        Measured first harmonics over phase.
    maps : array_like, shape (C, ny, nx)
        Measured spatial maps (e.g. the linear map at the peak lag).
    grid, orientations_deg, sfs_cpd, origin_deg, sf_axis
        As in :func:`inverse_map`.

    Returns
    -------
    InverseComparison
    """
    from_gratings = inverse_map(measured, orientations_deg, sfs_cpd, grid, origin_deg, sf_axis)
    from_map = band_limit(maps, grid, orientations_deg, sfs_cpd, origin_deg, sf_axis)
    if from_gratings.shape != from_map.shape:
        raise ValueError(f"measured {np.shape(measured)} and maps {np.shape(maps)} describe "
                         "different numbers of cells")
    return InverseComparison(from_gratings, from_map, map_similarity(from_gratings, from_map))


# ----------------------------------------------------------------------------------------------------
# size tuning
# ----------------------------------------------------------------------------------------------------

def size_tuning(maps, grid: Grid, center_xy_deg, radii_deg, supersample=8):
    """Linear responses to centred disks and annuli, predicted from spatial maps (area summation).

    The response to a uniform patch of unit contrast is ``sum_pixels k(x, y) coverage(x, y) dx dy``,
    where ``coverage`` is the fraction of the pixel inside the patch, estimated on a
    ``supersample x supersample`` lattice of points in each pixel. A centre-surround map answers a disk
    about the size of its centre more than a large one (Enroth-Cugell & Robson 1966).

    Parameters
    ----------
    maps : array_like, shape (ny, nx) or (C, ny, nx)
    grid : Grid
    center_xy_deg : (float, float) or array_like, shape (C, 2)
        Centre of the disks, one for all maps or one per map. A NaN centre gives NaN responses, and
        so does a NaN pixel inside a disk.
    radii_deg : array_like, shape (R,)
        Radii, >= 0.
    supersample : int
        Points per pixel side for partial coverage.

    Returns
    -------
    disk : numpy.ndarray, shape (..., R)
        Response to a disk of radius ``radii_deg[r]``.
    annulus : numpy.ndarray, shape (..., R)
        Response to an annulus with inner radius ``radii_deg[r]`` and outer radius ``max(radii_deg)``
        (``disk[max] - disk[r]``): the surround alone as the hole grows.
        A bright patch (contrast +1) is assumed; a dark patch gives the negatives.
    """
    m = np.asarray(maps, float)
    if m.ndim not in (2, 3) or m.shape[-2:] != grid.shape:
        raise ValueError(f"maps must have shape ({grid.ny}, {grid.nx}) or (C, {grid.ny}, {grid.nx}), "
                         f"got {m.shape}")
    radii = np.asarray(radii_deg, float).ravel()
    if radii.size == 0 or not np.all(np.isfinite(radii)) or np.any(radii < 0):
        raise ValueError(f"radii_deg must be finite and >= 0, got {radii_deg!r}")
    n_sub = int(supersample)
    if n_sub < 1:
        raise ValueError(f"supersample must be >= 1, got {supersample!r}")
    single = m.ndim == 2
    m3 = m[None] if single else m
    n_c = m3.shape[0]
    centre = np.asarray(center_xy_deg, float)
    if centre.shape == (2,):
        centre = np.broadcast_to(centre, (n_c, 2))
    if centre.shape != (n_c, 2):
        raise ValueError(f"center_xy_deg must be (x, y) or shape ({n_c}, 2), got {centre.shape}")
    u = ((np.arange(n_sub) + 0.5) / n_sub - 0.5)
    sx = (grid.x_deg[:, None] + u[None, :] * grid.dx_deg).ravel()        # (nx * n,)
    sy = (grid.y_deg[:, None] + u[None, :] * grid.dy_deg).ravel()        # (ny * n,)
    area = grid.dx_deg * grid.dy_deg / n_sub**2
    # each sub-sample point counts in the disks whose radius reaches it: with the radii sorted, its ring
    # is the first radius >= its distance; ring sums (bincount), then cumulative sums give the disks (a
    # NaN pixel in a ring makes that disk and every larger one NaN); cells in blocks, no sorting
    r_order = np.argsort(radii, kind="stable")
    r2 = radii[r_order] ** 2
    n_r = radii.size
    disk = np.full((n_c, n_r), np.nan)
    ok = np.flatnonzero(np.all(np.isfinite(centre), axis=1))   # no centre (e.g. no fit): responses NaN
    block = 32
    for lo in range(0, ok.size, block):
        cs = ok[lo:lo + block]
        d2 = ((sx[None, None, :] - centre[cs, 0, None, None]) ** 2
              + (sy[None, :, None] - centre[cs, 1, None, None]) ** 2)                # (b, ny n, nx n)
        ring = np.searchsorted(r2, d2.ravel(), side="left").reshape(d2.shape)      # n_r: outside every disk
        sub = np.repeat(np.repeat(m3[cs], n_sub, axis=1), n_sub, axis=2) * area
        idx = (ring + (n_r + 1) * np.arange(cs.size)[:, None, None]).ravel()
        rings = np.bincount(idx, weights=sub.ravel(), minlength=(n_r + 1) * cs.size).reshape(cs.size, n_r + 1)
        disk[cs[:, None], r_order[None, :]] = np.cumsum(rings[:, :n_r], axis=1)
    annulus = disk[:, [int(np.argmax(radii))]] - disk
    if single:
        return disk[0], annulus[0]
    return disk, annulus


# ----------------------------------------------------------------------------------------------------
# linearity call
# ----------------------------------------------------------------------------------------------------

def _as_float(v, n, name):
    if v is None:
        return np.full(n, np.nan)
    a = np.array([np.nan if x is None else x for x in np.asarray(v, object).ravel()], float)
    if a.size == 1 and n != 1:
        a = np.full(n, a[0])
    if a.size != n:
        raise ValueError(f"{name} must have one value per cell ({n}), got {a.size}")
    return a


def linearity_call(agreement, f1_f0=None, onoff_overlap=None, responsive=None,
                   agreement_threshold=AGREEMENT_THRESHOLD, f1_f0_threshold=F1_F0_THRESHOLD,
                   overlap_threshold=OVERLAP_THRESHOLD, grating_response=None, gain=None,
                   no_agreement_reason="no flashed gratings"):
    """Call each cell linear or not, with the reason.

    A cell is linear when all available criteria agree:

    1. the forward agreement between map and gratings is ``>= agreement_threshold`` (default 0.5,
       ours: the map predicts at least half the power of the measured grating surface);
    2. F1/F0 from drifting gratings is ``> f1_f0_threshold`` (default 1, Skottun et al. 1991), when
       drifting gratings exist (NaN = not available, criterion skipped);
    3. the ON/OFF overlap is ``<= overlap_threshold`` (default 0.5, ours): segregated ON and OFF
       subregions, the simple-cell criterion of Hubel & Wiesel (1962), when available.

    Parameters
    ----------
    agreement : array_like, shape (C,)
        Forward agreement (:func:`forward_agreement`), NaN when there were no gratings or no map.
    f1_f0 : array_like or None
        F1/F0 at the preferred condition; None or NaN when not available.
    onoff_overlap : array_like or None
        ON/OFF overlap in [0, 1] (0 = segregated, 1 = coextensive); None or NaN when not available.
    responsive : array_like of bool or None
        The sparse-noise ``responsive`` call per cell (None or NaN for a cell = no map: the call is
        empty with reason "no map"). None for the whole argument skips this check.
    grating_response : array_like of bool or None
        Whether the flashed gratings drove the cell at all: a significant first harmonic or a
        significant phase-invariant response. False leaves the call empty with the reason
        ``"no grating response"``: an agreement near 0 against a surface of pure noise measures
        nothing, and silence is not evidence of nonlinearity. None skips this check.
    gain : array_like or None
        The signed gain of :func:`forward_agreement` (time courses referred to the same latency). A
        negative gain (map and gratings of opposite sign at the same latency) fails the call.
    no_agreement_reason : str or array_like of str
        Reason given where ``agreement`` is NaN (per cell or one for all).

    Returns
    -------
    linear : numpy.ndarray of object, shape (C,)
        True, False, or None (empty: cannot be called).
    reason : numpy.ndarray of str, shape (C,)
        ``"not responsive"``, ``"no map"``, ``"no flashed gratings"`` (no agreement to judge; or
        ``no_agreement_reason``), ``"no grating response"``, or the criteria that decided, e.g.
        ``"agreement 0.12 < 0.50"``, ``"f1/f0 0.60 <= 1.00"``, ``"ON/OFF overlap 0.80 > 0.50"`` (all
        failing criteria, joined by "; "), or for a linear cell all criteria that were tested, joined
        by ", ".

    Examples
    --------
    >>> lin, why = linearity_call([0.9, 0.1, np.nan, 0.9], f1_f0=[1.5, 0.4, 1.0, np.nan],
    ...                           responsive=[True, True, True, False])
    >>> lin.tolist()
    [True, False, None, None]
    >>> why.tolist()
    ['agreement 0.90 >= 0.50, f1/f0 1.50 > 1.00', 'agreement 0.10 < 0.50; f1/f0 0.40 <= 1.00', \
'no flashed gratings', 'not responsive']
    """
    agr = np.asarray(agreement, float).ravel()
    n = agr.size
    f = _as_float(f1_f0, n, "f1_f0")
    ov = _as_float(onoff_overlap, n, "onoff_overlap")
    if responsive is None:
        resp = np.full(n, None, object)
    else:
        resp = np.asarray(responsive, object).ravel()
        if resp.size == 1 and n != 1:
            resp = np.full(n, resp[0], object)
        if resp.size != n:
            raise ValueError(f"responsive must have one value per cell ({n}), got {resp.size}")
    g = _as_float(gain, n, "gain")
    gr = None if grating_response is None else np.asarray(grating_response, object).ravel()
    if gr is not None and gr.size == 1 and n != 1:
        gr = np.full(n, gr[0], object)
    if gr is not None and gr.size != n:
        raise ValueError(f"grating_response must have one value per cell ({n}), got {gr.size}")
    why_nan = np.broadcast_to(np.asarray(no_agreement_reason, object), (n,))
    linear = np.full(n, None, object)
    reason = np.empty(n, object)
    for c in range(n):  # per-cell strings; C is small
        if responsive is not None:
            r = resp[c]
            if r is None or (isinstance(r, float) and np.isnan(r)):
                reason[c] = "no map"
                continue
            if not bool(r):
                reason[c] = "not responsive"
                continue
        if np.isnan(agr[c]):
            reason[c] = str(why_nan[c])
            continue
        if gr is not None and gr[c] is not None and not (isinstance(gr[c], float) and np.isnan(gr[c])) \
                and not bool(gr[c]):
            reason[c] = "no grating response"
            continue
        passed, failed = [], []
        if np.isfinite(g[c]) and g[c] < 0:
            failed.append("map and gratings of opposite sign")
        if agr[c] >= agreement_threshold:
            passed.append(f"agreement {agr[c]:.2f} >= {agreement_threshold:.2f}")
        else:
            failed.append(f"agreement {agr[c]:.2f} < {agreement_threshold:.2f}")
        if np.isfinite(f[c]):
            if f[c] > f1_f0_threshold:
                passed.append(f"f1/f0 {f[c]:.2f} > {f1_f0_threshold:.2f}")
            else:
                failed.append(f"f1/f0 {f[c]:.2f} <= {f1_f0_threshold:.2f}")
        if np.isfinite(ov[c]):
            if ov[c] <= overlap_threshold:
                passed.append(f"ON/OFF overlap {ov[c]:.2f} <= {overlap_threshold:.2f}")
            else:
                failed.append(f"ON/OFF overlap {ov[c]:.2f} > {overlap_threshold:.2f}")
        linear[c] = not failed
        reason[c] = "; ".join(failed) if failed else ", ".join(passed)
    return linear, reason.astype(str)


# ----------------------------------------------------------------------------------------------------
# locally isotropic visual angle
# ----------------------------------------------------------------------------------------------------

#: The extra ``cells.csv`` columns of :func:`local_angle_columns`, in order.
LOCAL_ANGLE_COLUMNS = ("size_local_deg", "sigma_major_local_deg", "sigma_minor_local_deg", "theta_local_deg",
                       "gabor_sf_local_cpd", "gabor_orientation_local_deg", "pref_sf_local_cpd",
                       "pref_orientation_local_deg")

#: Below this cos(elevation) (about 87 deg) local angles are not reported.
_MIN_COS_ELEVATION = 0.05


def _local_wave(ori_deg, sf_cpd, c):
    th = np.deg2rad(np.asarray(ori_deg, float))
    kx, ky = np.asarray(sf_cpd, float) * np.cos(th) / c, np.asarray(sf_cpd, float) * np.sin(th)
    return np.hypot(kx, ky), np.mod(np.degrees(np.arctan2(ky, kx)), 180.0)


def local_angle_columns(center_y_deg, fits=None, tuning=None) -> dict:
    """Sizes, SFs and orientations in locally isotropic degrees at each cell's elevation.

    Grid coordinates are azimuth and elevation (:mod:`map2d.geometry`). On the sphere a step of ``d``
    degrees of azimuth at elevation ``e`` spans ``d cos(e)`` degrees of visual angle, a step of
    elevation ``d`` degrees: near the horizon the two agree, at 60 deg elevation azimuth extents are
    halved. Spherical corrections of this kind are common practice in mouse work, whose fields reach
    high elevations (e.g. Marshel et al. 2011, Neuron 72:1040, cited from memory). With
    ``J = diag(cos e, 1)`` at the cell's centre elevation ``e``, a kernel of covariance ``S`` (grid
    degrees) has covariance ``J S J`` in local degrees, and a wave vector ``(kx, ky)`` (cycles per grid
    degree) is ``(kx / cos e, ky)`` in cycles per local degree (the transpose inverse). Linear to first
    order around the centre: a local description, not a re-mapping of the whole field.

    Parameters
    ----------
    center_y_deg : array_like (C,)
        Elevation of each cell's centre (NaN: nothing reported).
    fits : mapping, optional
        :func:`map2d.fit.spatial.fit_maps` columns (``size_deg``, ``sigma_major_deg``,
        ``sigma_minor_deg``, ``theta_deg``, ``gabor_sf_cpd``, ``gabor_orientation_deg``).
    tuning : mapping, optional
        Grating tuning columns (``pref_sf_cpd``, ``pref_orientation_deg``).

    Returns
    -------
    dict of column -> numpy.ndarray (C,)
        :data:`LOCAL_ANGLE_COLUMNS`: ``size_local_deg`` (``size_deg * sqrt(cos e)``: the geometric mean
        of the local widths), the local envelope (major, minor sd and major-axis angle in [0, 180)), the
        Gabor's and the gratings' preferred SF and orientation (wave-vector angle) in local terms. NaN
        where an input is missing or ``cos e < 0.05``.

    Examples
    --------
    >>> c = local_angle_columns([60.0], {"size_deg": [2.0], "sigma_major_deg": [4.0], "sigma_minor_deg": [2.0],
    ...                                  "theta_deg": [0.0]}, {"pref_sf_cpd": [0.05], "pref_orientation_deg": [0.0]})
    >>> [round(float(c[k][0]), 3) for k in ("sigma_major_local_deg", "sigma_minor_local_deg", "pref_sf_local_cpd")]
    [2.0, 2.0, 0.1]
    """
    e = np.asarray(center_y_deg, float).ravel()
    n = e.size
    c = np.cos(np.deg2rad(e))
    ok = np.isfinite(c) & (c >= _MIN_COS_ELEVATION)
    c = np.where(ok, c, np.nan)
    out = {k: np.full(n, np.nan) for k in LOCAL_ANGLE_COLUMNS}

    def col(src, name):
        return _col(src, name, n) if src is not None else np.full(n, np.nan)

    out["size_local_deg"] = col(fits, "size_deg") * np.sqrt(c)
    a, b, th = col(fits, "sigma_major_deg"), col(fits, "sigma_minor_deg"), np.deg2rad(col(fits, "theta_deg"))
    # J S J with S = R diag(a^2, b^2) R^T, J = diag(c, 1)
    sxx = c**2 * (a**2 * np.cos(th) ** 2 + b**2 * np.sin(th) ** 2)
    syy = a**2 * np.sin(th) ** 2 + b**2 * np.cos(th) ** 2
    sxy = c * (a**2 - b**2) * np.sin(th) * np.cos(th)
    mean, diff = (sxx + syy) / 2, np.sqrt(((sxx - syy) / 2) ** 2 + sxy**2)
    out["sigma_major_local_deg"] = np.sqrt(mean + diff)
    out["sigma_minor_local_deg"] = np.sqrt(np.maximum(mean - diff, 0.0))
    out["theta_local_deg"] = np.mod(np.degrees(0.5 * np.arctan2(2 * sxy, sxx - syy)), 180.0)
    out["gabor_sf_local_cpd"], out["gabor_orientation_local_deg"] = _local_wave(
        col(fits, "gabor_orientation_deg"), col(fits, "gabor_sf_cpd"), c)
    out["pref_sf_local_cpd"], out["pref_orientation_local_deg"] = _local_wave(
        col(tuning, "pref_orientation_deg"), col(tuning, "pref_sf_cpd"), c)
    for k in ("theta_local_deg", "gabor_orientation_local_deg", "pref_orientation_local_deg"):
        src = {"theta_local_deg": th, "gabor_orientation_local_deg": col(fits, "gabor_orientation_deg"),
               "pref_orientation_local_deg": col(tuning, "pref_orientation_deg")}[k]
        out[k] = np.where(np.isfinite(src) & ok, out[k], np.nan)
    return out
