"""Model fits to a spatial receptive-field map: 2-D Gaussian, difference of Gaussians, Gabor.

A map is an array ``(ny, nx)`` on a :class:`map2d.geometry.Grid` (row 0 at the top). Every model is
evaluated at the pixel centres in degrees from :meth:`Grid.mesh_deg`, never at array indices, so a
fitted centre is in visual-space degrees (azimuth ``x``, elevation ``y`` up) and a fitted orientation
follows the contract (wave-vector angle counter-clockwise from +x, 0 deg = vertical stripes).

Models (functions from :mod:`map2d.models`)
-------------------------------------------
``gaussian``
    :func:`~map2d.models.gaussian2d`: centre, two widths, angle of the major axis, signed amplitude
    (6 parameters). A negative amplitude is an OFF field.
``dog``
    :func:`~map2d.models.dog2d` (Enroth-Cugell & Robson 1966): circular centre and surround,
    ``kc exp(-r^2/rc^2) - ks exp(-r^2/rs^2)`` with ``rs > rc`` and ``kc``, ``ks`` of the same sign
    (ON centre: both >= 0; OFF centre: both <= 0); 6 parameters. With ``ks = 0`` it is a circular
    Gaussian, so it nests the circular case of the ``gaussian`` model (not the elliptical one).
``gabor``
    :func:`~map2d.models.gabor2d` (Jones & Palmer 1987): envelope centre, widths along (``sigma_u``)
    and across (``sigma_v``) the wave vector, orientation, spatial frequency, phase, amplitude
    (8 parameters). The phase is relative to the envelope centre (``gabor2d``'s convention).

Fitting
-------
:func:`scipy.optimize.least_squares` (trust-region reflective, bounds) with analytic Jacobians in an
internal parameterisation chosen for conditioning (the Gabor uses the wave vector ``(kx, ky)`` and
the cosine/sine amplitudes, so neither angle nor phase wraps during the search), from a few data-driven
starts: the peak of the lightly smoothed map and its second moments (Gaussian, DoG), and the peaks of
the zero-padded 2-D power spectrum for the Gabor's wave vector (the row axis is flipped, since row 0 is
the top). Each start gets a short run (12 evaluations) and the best is refined to convergence.
Many maps (:func:`fit_maps`, :func:`locate_fields`) are fitted by :mod:`map2d.fit.batched` by default: the
same starts, bounds, multi-start rule, criteria and intervals, with every start of every map advanced
together by a vectorised Levenberg-Marquardt (``solver='reference'`` keeps ``least_squares``).
Bounds: centre within a quarter of the grid's extent beyond its edges; widths between 0.3 pixel and
the grid's largest extent (the DoG surround radius at least 1.05 times the centre's); Gabor frequency
below the Nyquist limit on each axis (``|kx| <= 1/(2 dx)``, ``|ky| <= 1/(2 dy)``). Non-finite pixels
are ignored. Cost on a 24 x 32 map: about 7, 11 and 19 ms of CPU for the Gaussian, DoG and Gabor.

Weighting, information criterion and confidence intervals
---------------------------------------------------------
With ``noise_sd`` (scalar or per pixel) residuals are divided by it. The information criterion is
computed from the Gaussian log-likelihood:

- known noise: ``AIC = chi2 + n ln(2 pi sd^2) + 2 k`` with ``chi2 = sum(((model - map) / sd)^2)``;
- unknown noise: ``AIC = n ln(RSS / n) + 2 k`` (maximum-likelihood variance; the constant and the
  variance parameter are common to all models and cancel in comparisons);
- ``BIC`` replaces ``2 k`` by ``k ln n`` (Schwarz 1978).

BIC chooses the model by default (``criterion="aic"`` is available). The reason is measured, not
assumed: on 24 x 32 maps with peak signal-to-noise 10, AIC called 5 of 30 elliptical-Gaussian fields
Gabors (the Gabor contains the Gaussian as its zero-frequency limit, and AIC's light penalty lets two
extra parameters fit noise), BIC none, while both recognised all 30 Gabor fields. Both criteria are
reported for every model tried.

Confidence intervals are 95 % intervals ``estimate +- 1.96 sd`` from a heteroscedasticity-consistent
("sandwich") covariance of the estimates, HC3 (MacKinnon & White 1985; White 1980 for the sandwich):
``cov = A^-1 J^T diag(r_i^2 / (1 - h_i)^2) J A^-1`` with ``A = J^T J``, ``J`` the (weighted) central-difference
Jacobian of the :mod:`map2d.models` function with respect to the *reported* parameters (so intervals
are in the reported units), ``r_i`` the (weighted) residual of pixel ``i`` at the optimum and
``h_i = J_i A^-1 J_i^T`` its leverage (at most :data:`MAX_LEVERAGE`). No variance is taken below the
Wald one, ``s^2 A^-1`` (Press et al., section 15.6), with ``s^2 = RSS / (n - k)`` when the noise is
unknown and, with a known ``noise_sd``, ``sd^2`` inflated by the reduced chi-square when that exceeds 1
(the scale-factor practice of the Particle Data Group, Review of Particle Physics, "Introduction").

Why the sandwich: the Wald covariance assumes every pixel equally noisy, and a map's noise is not:
spike counts are Poisson, so the pixels of the field, which carry the centre's and the widths'
information, are the noisiest, and a thresholded cell's noise is almost all there. HC3 divides each
squared residual by ``(1 - h_i)^2`` because a field's pixels have a high leverage and their residuals
understate their noise; it is the variant recommended for samples of a few hundred or less (Long &
Ervin 2000), which the pixels near a field are. The floor keeps a sandwich that is small by chance (its
own variance is large when few pixels carry a parameter) from reporting an interval narrower than the
equal-noise one. :func:`fit_check`'s "centre not determined" tests the equal-noise (Wald) centre
intervals (``SpatialFit.ci_equal_noise``): it asks whether the model's geometry pins the centre.
Measured:

- on the held-out validation sessions (``benchmarks/centre_errors.py``, 10 seeds, 484 accepted fits)
  the 95 % centre boxes covered the true centre in 93 % of cells (76-100 % by regime, thresholded cells
  the lowest; nominal at least 90 %), the Wald ones in 78 % (23 % for thresholded cells); median
  half-width 0.37 pixel instead of 0.24; the plain sandwich (HC0) covered 65 %, HC2 (``1 - h_i``) 78 %;
  on the benchmark session (``benchmarks/bench_maps.py``, 10 minutes, 177 fits) 90 % instead of 69 %;
- over 100 noisy repeats on a 24 x 32 map (Gaussian, DoG, Gabor at peak signal-to-noise 5 and 20),
  equal noise: every parameter 92-100 % (the Wald intervals 91-99 %); noise variance growing with the
  signal (4 times at the peak, noise not given): centre 91-97 %, other parameters 84-97 % (the Wald:
  centre 77-91 %, amplitude 72-77 %).

A parameter that is not identifiable at the optimum (e.g. the angle of a circular Gaussian, a surround
of zero strength) has a NaN interval. Angles' and phases' intervals are ``estimate +- 1.96 sd`` and may
extend past the folding range. Intervals are local (linearised) and assume independent pixel noise;
they hold the estimate's noise, not a bias of the model: a rectified cell's map is narrower than its
kernel, so its widths' intervals miss the kernel's (held-out sessions: the Gaussian and Gabor widths' intervals
covered 78-90 % of true widths, the DoG radii's 97-100 %, thresholded cells' widths 0-17 %).

References
----------
Enroth-Cugell C, Robson JG (1966) J Physiol 187:517-552.
Jones JP, Palmer LA (1987) J Neurophysiol 58:1233-1258.
Akaike H (1974) A new look at the statistical model identification. IEEE Trans Autom Control 19:716-723.
Schwarz G (1978) Estimating the dimension of a model. Ann Stat 6:461-464.
Press WH et al., Numerical Recipes, 3rd ed., section 15.6 (confidence limits from the covariance matrix).
White H (1980) A heteroskedasticity-consistent covariance matrix estimator and a direct test for
heteroskedasticity. Econometrica 48:817-838.
MacKinnon JG, White H (1985) Some heteroskedasticity-consistent covariance matrix estimators with improved
finite sample properties. J Econometrics 29:305-325.
Long JS, Ervin LH (2000) Using heteroscedasticity consistent standard errors in the linear regression
model. Am Stat 54:217-224.
"""

from __future__ import annotations

import contextlib
import math
import os
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage

from .._blas import with_one_blas_thread
from .._forked import worker_pool
from ..geometry import Grid
from ..models import dog2d, gabor2d, gaussian2d

__all__ = [
    "SpatialFit",
    "fit_gaussian",
    "fit_dog",
    "fit_gabor",
    "fit_map",
    "fit_maps",
    "FIT_COLUMNS",
    "MODELS",
    "remove_pixel_box",
    "fit_check",
    "locate_fields",
    "CellFields",
    "subfield_overlap",
    "envelope_overlap",
]

MODELS = ("gaussian", "dog", "gabor")
Z95 = 1.959963984540054  # two-sided 95 % normal quantile

# Reported parameter names (and order) per model.
_PARAM_NAMES = {
    "gaussian": ("center_x_deg", "center_y_deg", "sigma_major_deg", "sigma_minor_deg", "theta_deg",
                 "amplitude"),
    "dog": ("center_x_deg", "center_y_deg", "kc", "rc_deg", "ks", "rs_deg"),
    "gabor": ("center_x_deg", "center_y_deg", "sigma_u_deg", "sigma_v_deg", "orientation_deg",
              "sf_cpd", "phase_deg", "amplitude"),
}


# --------------------------------------------------------------------------------------------------
# result
# --------------------------------------------------------------------------------------------------

@dataclass
class SpatialFit:
    """The fit of one model to one map (the chosen one, for :func:`fit_map`).

    Attributes
    ----------
    model : str
        ``'gaussian'``, ``'dog'`` or ``'gabor'``.
    params : dict of str to float
        Named parameters with units in the names, model by model:
        gaussian: ``center_x_deg, center_y_deg, sigma_major_deg, sigma_minor_deg, theta_deg`` (major
        axis, counter-clockwise from +x, in [0, 180)), ``amplitude`` (signed);
        dog: ``center_x_deg, center_y_deg, kc, rc_deg, ks, rs_deg`` (``kc``, ``ks`` >= 0 ON centre,
        <= 0 OFF centre; ``rc``, ``rs`` are 1/e radii);
        gabor: ``center_x_deg, center_y_deg, sigma_u_deg`` (envelope sd along the wave vector),
        ``sigma_v_deg`` (across), ``orientation_deg`` (wave-vector angle in [0, 180)), ``sf_cpd``,
        ``phase_deg`` (in [0, 360), relative to the envelope centre), ``amplitude`` (> 0).
    ci : dict of str to (float, float)
        95 % interval per parameter (HC3 sandwich, module notes); ``(nan, nan)`` when not identifiable.
    aic : dict of str to float
        AIC of every model tried (module notes).
    bic : dict of str to float
        BIC of every model tried.
    r2 : float
        ``1 - RSS / TSS`` of the chosen model on the finite pixels (unweighted).
    predicted : numpy.ndarray
        The model evaluated on the grid, ``(ny, nx)``.
    criterion : str
        ``'aic'`` or ``'bic'``: what chose the model (for a single-model fit, ``'none'``).
    n_pixels : int
        Number of finite pixels used.
    ci_equal_noise : dict of str to (float, float)
        The centre's 95 % intervals from the equal-noise (Wald) covariance ``s^2 A^-1`` (module notes),
        which :func:`fit_check` tests; empty when not computed.
    """

    model: str
    params: dict
    ci: dict
    aic: dict
    r2: float
    predicted: np.ndarray
    bic: dict = field(default_factory=dict)
    criterion: str = "none"
    n_pixels: int = 0
    ci_equal_noise: dict = field(default_factory=dict)

    @property
    def center_x_deg(self) -> float:
        """Azimuth of the centre of the model's envelope (degrees)."""
        return float(self.params["center_x_deg"])

    @property
    def center_y_deg(self) -> float:
        """Elevation of the centre of the model's envelope (degrees)."""
        return float(self.params["center_y_deg"])


# --------------------------------------------------------------------------------------------------
# shared preparation
# --------------------------------------------------------------------------------------------------

class _Problem:
    """Pixel positions, data and weights of one map (finite pixels only)."""

    def __init__(self, map_yx, grid, noise_sd):
        if not isinstance(grid, Grid):
            raise TypeError(f"grid must be a map2d.geometry.Grid, got {type(grid).__name__}")
        m = np.asarray(map_yx, dtype=float)
        if m.shape != grid.shape:
            raise ValueError(f"map_yx has shape {m.shape}, the grid is {grid.shape}")
        self.grid = grid
        self.map = m
        X, Y = grid.mesh_deg()
        self.X, self.Y = X, Y
        ok = np.isfinite(m)
        if noise_sd is None:
            sd = None
        else:
            sd = np.broadcast_to(np.asarray(noise_sd, dtype=float), m.shape)
            if not np.all(np.isfinite(sd[ok]) & (sd[ok] > 0)):
                raise ValueError("noise_sd must be finite and > 0 at every finite pixel")
        self.known_noise = sd is not None
        self.ok = ok
        self.x = X[ok]
        self.y = Y[ok]
        self.d = m[ok]
        self.n = int(ok.sum())
        self.w = (1.0 / sd[ok]) if sd is not None else np.ones(self.n)
        self.sd = sd[ok] if sd is not None else None
        self.dx, self.dy = float(grid.dx_deg), float(grid.dy_deg)
        ext_x, ext_y = grid.nx * self.dx, grid.ny * self.dy
        self.ext = max(ext_x, ext_y)
        self.wmin = 0.3 * min(self.dx, self.dy)
        self.wmax = self.ext
        xs, ys = grid.x_deg, grid.y_deg
        mx, my = 0.25 * ext_x, 0.25 * ext_y
        self.xlo, self.xhi = xs.min() - mx, xs.max() + mx
        self.ylo, self.yhi = ys.min() - my, ys.max() + my
        self.nyq_x, self.nyq_y = 0.5 / self.dx, 0.5 / self.dy
        scale = np.nanmax(np.abs(m)) if self.n else 0.0
        self.scale = float(scale) if np.isfinite(scale) and scale > 0 else 1.0

    # ---- data-driven starting points -----------------------------------------------------------
    def smoothed(self, sigma_px=0.8):
        m = np.where(self.ok, self.map, 0.0)
        wts = ndimage.gaussian_filter(self.ok.astype(float), sigma_px, mode="constant")
        sm = ndimage.gaussian_filter(m, sigma_px, mode="constant")
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(wts > 1e-6, sm / wts, 0.0)

    def blob_start(self):
        """(x0, y0, s_major, s_minor, theta_rad, amplitude) from the peak and second moments."""
        if getattr(self, "blob", None) is not None:     # computed already (map2d.fit.batched, many maps)
            return self.blob
        sm = self.smoothed()
        i, j = np.unravel_index(np.argmax(np.abs(sm)), sm.shape)
        sign = 1.0 if sm[i, j] >= 0 else -1.0
        peak = sm[i, j]
        x0, y0 = self.X[i, j], self.Y[i, j]
        w = np.clip(sign * sm, 0.0, None)
        w = np.where(w > 0.3 * abs(peak), w, 0.0)
        # keep the connected blob containing the peak
        lab, _ = ndimage.label(w > 0)
        w = np.where(lab == lab[i, j], w, 0.0)
        tot = w.sum()
        s_maj = s_min = 1.5 * min(self.dx, self.dy)
        theta = 0.0
        if tot > 0:
            mx = (w * self.X).sum() / tot
            my = (w * self.Y).sum() / tot
            cxx = (w * (self.X - mx) ** 2).sum() / tot + self.dx**2 / 12
            cyy = (w * (self.Y - my) ** 2).sum() / tot + self.dy**2 / 12
            cxy = (w * (self.X - mx) * (self.Y - my)).sum() / tot
            ev, evec = np.linalg.eigh(np.array([[cxx, cxy], [cxy, cyy]]))
            # the thresholded blob (above 0.3 of the peak) under-estimates the sd: a Gaussian cut at
            # 0.3 of its peak has a truncated variance of about 0.55 sigma^2
            ev = np.clip(ev / 0.55, self.wmin**2 * 4, self.wmax**2)
            s_min, s_maj = float(np.sqrt(ev[0])), float(np.sqrt(ev[1]))
            theta = float(np.arctan2(evec[1, 1], evec[0, 1]))
            x0, y0 = mx, my
        return (float(x0), float(y0), s_maj, s_min, theta, float(self.map[i, j]) if
                np.isfinite(self.map[i, j]) else float(peak))

    def spectral_peaks(self, n_peaks=2):
        """Wave vectors ``(kx, ky)`` of the largest local maxima of the padded power spectrum."""
        m = np.where(self.ok, self.map - np.mean(self.d), 0.0)
        ny, nx = m.shape
        Ny, Nx = max(64, 4 * ny), max(64, 4 * nx)
        P = np.abs(np.fft.fft2(m, s=(Ny, Nx))) ** 2
        fx = np.fft.fftfreq(Nx, d=self.dx)
        fr = np.fft.fftfreq(Ny, d=self.dy)
        # row index grows downward, i.e. toward lower elevation: the y-frequency is minus the row one
        KX, KY = np.meshgrid(fx, -fr)
        half = (KX > 0) | ((KX == 0) & (KY > 0))
        mx = ndimage.maximum_filter(P, size=3, mode="wrap")
        cand = np.flatnonzero((P == mx) & half & (P > 0))
        if cand.size == 0:
            return [(0.5 * self.nyq_x * 0.2, 0.0)]
        order = cand[np.argsort(P.ravel()[cand])[::-1]]
        out = []
        for idx in order[:n_peaks]:
            out.append((float(KX.ravel()[idx]), float(KY.ravel()[idx])))
        return out

    # ---- statistics -----------------------------------------------------------------------------
    def criteria(self, pred, k):
        r = pred - self.d
        if self.known_noise:
            chi2 = float(np.sum((r * self.w) ** 2))
            base = chi2 + float(np.sum(np.log(2 * np.pi * self.sd**2)))
        else:
            rss = float(np.sum(r**2))
            base = self.n * math.log(max(rss, 1e-300) / self.n)
        return base + 2 * k, base + k * math.log(self.n)

    def r2(self, pred):
        tss = float(np.sum((self.d - self.d.mean()) ** 2))
        rss = float(np.sum((pred - self.d) ** 2))
        return 1.0 - rss / tss if tss > 0 else float("nan")

    def covariance(self, fun, p):
        """Covariances of the reported parameters ``p`` of ``fun(x, y, *p)``: the HC3 sandwich (module notes)
        and the Wald one (:func:`_sandwich_cov`)."""
        p = np.asarray(p, float)
        k = p.size
        J = np.empty((self.n, k))
        for i in range(k):
            h = 1e-6 * (abs(p[i]) + 1.0)
            pp, pm = p.copy(), p.copy()
            pp[i] += h
            pm[i] -= h
            J[:, i] = (fun(self.x, self.y, *pp) - fun(self.x, self.y, *pm)) / (2 * h)
        J *= self.w[:, None]
        r = (fun(self.x, self.y, *p) - self.d) * self.w
        dof = max(self.n - k, 1)
        red = float(r @ r) / dof
        s2 = max(1.0, red) if self.known_noise else red
        return _sandwich_cov(J, r, s2)


#: Leverage above which a pixel's HC3 term is computed as at this leverage (``1 / (1 - h)^2`` at most
#: 10^4): a pixel that alone determines a parameter leaves (almost) no residual to estimate its noise from.
MAX_LEVERAGE = 0.99


def _normal_pinv(A):
    """``(inv, unknown)`` of the normal matrix ``A = J^T J`` (k, k): ``inv`` its inverse on the identifiable
    parameters (a pseudo-inverse; columns scaled to a unit diagonal for a meaningful eigen-threshold; 0 for
    a parameter without effect), ``unknown`` (k,) the parameters that are not identifiable at the optimum
    (no effect, or a real share in a direction of no effect)."""
    k = A.shape[0]
    inv = np.zeros((k, k))
    if not np.all(np.isfinite(A)):
        return inv, np.ones(k, bool)
    c = np.sqrt(np.diag(A))
    good = c > 0
    if not np.any(good):
        return inv, np.ones(k, bool)
    cg = np.outer(c[good], c[good])
    w, V = np.linalg.eigh(A[np.ix_(good, good)] / cg)
    null = w <= 1e-9 * max(w.max(), 1e-300)
    idx = np.flatnonzero(good)
    inv[np.ix_(idx, idx)] = (V[:, ~null] / w[~null]) @ V[:, ~null].T / cg
    # a parameter with a real share in an unidentified direction has no finite interval
    bad = np.sum(V[:, null] ** 2, axis=1) > 1e-6 if np.any(null) else np.zeros(good.sum(), bool)
    unknown = ~good
    unknown[idx[bad]] = True
    return inv, unknown


def _wald_cov(A, s2):
    """``s2 A^-1`` for the normal matrix ``A = J^T J``, NaN for parameters that are not identifiable."""
    inv, unknown = _normal_pinv(A)
    cov = s2 * inv
    cov[unknown, :] = np.nan
    cov[:, unknown] = np.nan
    return cov


def _sandwich_cov(J, r, s2):
    """HC3 sandwich covariance ``A^-1 J^T diag(r_i^2 / (1 - h_i)^2) J A^-1`` (module notes) of the weighted
    Jacobian ``J`` (n, k) and weighted residuals ``r`` (n,) at the optimum, ``A = J^T J``, ``h_i`` the
    leverage of pixel ``i`` (MacKinnon & White 1985), no variance below the Wald one ``s2 A^-1``; returns
    it and the Wald covariance. NaN for parameters that are not identifiable."""
    inv, unknown = _normal_pinv(J.T @ J)
    h = np.einsum("ij,jk,ik->i", J, inv, J)
    e = (r / np.maximum(1.0 - h, 1.0 - MAX_LEVERAGE)) ** 2
    wald = s2 * inv
    cov = _floored((inv @ (J.T @ (J * e[:, None])) @ inv)[None], wald[None])[0]
    for c in (cov, wald):
        c[unknown, :] = np.nan
        c[:, unknown] = np.nan
    return cov, wald


def _floored(cov, floor):
    """Covariances ``cov`` (m, k, k) whose variances below those of ``floor`` (m, k, k) are raised to them
    (rows and columns scaled, so correlations are kept; a parameter of zero variance takes ``floor``'s)."""
    v, v0 = np.einsum("mii->mi", cov), np.einsum("mii->mi", floor)
    pos = v > 0
    f = np.sqrt(np.where(pos, np.maximum(1.0, v0 / np.where(pos, v, 1.0)), 1.0))
    out = cov * f[:, :, None] * f[:, None, :]
    zero = ~pos & (v0 > 0)
    if zero.any():
        out = np.where(zero[:, :, None] | zero[:, None, :], 0.0, out)
        m, i = np.nonzero(zero)
        out[m, i, i] = v0[m, i]
    return out


def _intervals(names, p, cov):
    sd = np.sqrt(np.where(np.diag(cov) >= 0, np.diag(cov), np.nan))
    return {n: (float(v - Z95 * s), float(v + Z95 * s)) if np.isfinite(s) else (np.nan, np.nan)
            for n, v, s in zip(names, p, sd)}


def _centre_intervals(names, p, cov):
    """The centre's entries of :func:`_intervals` (``SpatialFit.ci_equal_noise``)."""
    ci = _intervals(names, p, cov)
    return {n: ci[n] for n in ("center_x_deg", "center_y_deg")}


def _solve(fun, jac, starts, lo, hi, args=(), screen_nfev=12, tol=1e-8):
    """Least squares from several starts: a short run from each, then the best run to convergence.

    Returns the final :class:`scipy.optimize.OptimizeResult`, or None if every start failed.
    """
    from scipy.optimize import least_squares

    lo = np.asarray(lo, float)
    hi = np.asarray(hi, float)
    with np.errstate(invalid="ignore"):
        lo_in = np.where(np.isfinite(lo), lo + 1e-9 * (np.abs(lo) + 1), lo)
        hi_in = np.where(np.isfinite(hi), hi - 1e-9 * (np.abs(hi) + 1), hi)

    def run(p0, nfev):
        p0 = np.clip(np.asarray(p0, float), lo_in, hi_in)
        try:
            res = least_squares(fun, p0, jac=jac, bounds=(lo, hi), args=args, method="trf",
                                x_scale="jac", ftol=tol, xtol=tol, gtol=tol, max_nfev=nfev)
        except (ValueError, np.linalg.LinAlgError):
            return None
        return res if np.all(np.isfinite(res.x)) and np.isfinite(res.cost) else None

    starts = list(starts)
    if len(starts) == 1:
        return run(starts[0], 300)
    best = None
    for p0 in starts:
        res = run(p0, screen_nfev)
        if res is not None and (best is None or res.cost < best.cost):
            best = res
    if best is None or best.status != 0:      # converged already (status > 0) or failed
        return best
    final = run(best.x, 300)
    return final if final is not None and final.cost <= best.cost else best


def _empty_fit(model, pr):
    names = _PARAM_NAMES[model]
    return SpatialFit(model=model, params={n: np.nan for n in names},
                      ci={n: (np.nan, np.nan) for n in names}, aic={model: np.nan},
                      bic={model: np.nan}, r2=np.nan, predicted=np.full(pr.grid.shape, np.nan),
                      n_pixels=pr.n)


def _finish(model, pr, fun, p_rep):
    names = _PARAM_NAMES[model]
    pred_full = fun(pr.X, pr.Y, *p_rep)
    pred = pred_full[pr.ok]
    k = len(names)
    aic, bic = pr.criteria(pred, k)
    cov, wald = pr.covariance(fun, p_rep)
    return SpatialFit(model=model, params={n: float(v) for n, v in zip(names, p_rep)},
                      ci=_intervals(names, p_rep, cov), aic={model: aic}, bic={model: bic},
                      r2=pr.r2(pred), predicted=pred_full, criterion="none", n_pixels=pr.n,
                      ci_equal_noise=_centre_intervals(names, p_rep, wald))


def _enough(pr, k):
    return pr.n > k + 1 and np.any(pr.d != pr.d[0])


# --------------------------------------------------------------------------------------------------
# Gaussian
# --------------------------------------------------------------------------------------------------

def _gauss_parts(p, x, y):
    x0, y0, su, sv, th, A = p
    c, s = math.cos(th), math.sin(th)
    dx, dy = x - x0, y - y0
    u = dx * c + dy * s
    v = -dx * s + dy * c
    E = np.exp(-0.5 * (u / su) ** 2 - 0.5 * (v / sv) ** 2)
    return c, s, u, v, E


def _gauss_res(p, pr):
    *_, E = _gauss_parts(p, pr.x, pr.y)
    return (p[5] * E - pr.d) * pr.w


def _gauss_jac(p, pr):
    x0, y0, su, sv, th, A = p
    c, s, u, v, E = _gauss_parts(p, pr.x, pr.y)
    AE = A * E
    au, av = u / su**2, v / sv**2
    J = np.empty((pr.n, 6))
    J[:, 0] = AE * (au * c - av * s)           # -dq/dx0 = u/su^2 c - v/sv^2 s
    J[:, 1] = AE * (au * s + av * c)
    J[:, 2] = AE * u**2 / su**3
    J[:, 3] = AE * v**2 / sv**3
    J[:, 4] = -AE * u * v * (1 / su**2 - 1 / sv**2)
    J[:, 5] = E
    return J * pr.w[:, None]


def _gauss_report(p):
    """Internal (x0, y0, su, sv, theta_rad, A) -> reported (.., major, minor, theta_deg mod 180, A)."""
    x0, y0, su, sv, th, A = p
    if sv > su:
        su, sv, th = sv, su, th + math.pi / 2
    return np.array([x0, y0, su, sv, math.degrees(th) % 180.0, A])


def _gauss_model(x, y, x0, y0, s_major, s_minor, theta_deg, amplitude):
    return gaussian2d(x, y, x0, y0, s_major, s_minor, theta_deg, amplitude)


def _gauss_setup(pr):
    """Starts and bounds of the Gaussian fit (internal parameters), shared by both solvers."""
    x0, y0, smaj, smin, th, A = pr.blob_start()
    r = 1.5 * min(pr.dx, pr.dy)
    starts = [(x0, y0, smaj, smin, th, A), (x0, y0, r, r, 0.0, A)]
    big = 1e3 * pr.scale
    lo = [pr.xlo, pr.ylo, pr.wmin, pr.wmin, -np.inf, -big]
    hi = [pr.xhi, pr.yhi, pr.wmax, pr.wmax, np.inf, big]
    return starts, lo, hi


def _fit_gaussian_pr(pr):
    if not _enough(pr, 6):
        return _empty_fit("gaussian", pr)
    starts, lo, hi = _gauss_setup(pr)
    res = _solve(_gauss_res, _gauss_jac, starts, lo, hi, args=(pr,))
    if res is None:
        return _empty_fit("gaussian", pr)
    return _finish("gaussian", pr, _gauss_model, _gauss_report(res.x))


# --------------------------------------------------------------------------------------------------
# difference of Gaussians
# --------------------------------------------------------------------------------------------------

def _dog_parts(p, x, y):
    x0, y0, kc, rc, ks, m = p
    rs = rc * m
    dx, dy = x - x0, y - y0
    r2 = dx * dx + dy * dy
    Ec = np.exp(-r2 / rc**2)
    Es = np.exp(-r2 / rs**2)
    return rs, dx, dy, r2, Ec, Es


def _dog_res(p, pr):
    rs, dx, dy, r2, Ec, Es = _dog_parts(p, pr.x, pr.y)
    return (p[2] * Ec - p[4] * Es - pr.d) * pr.w


def _dog_jac(p, pr):
    x0, y0, kc, rc, ks, m = p
    rs, dx, dy, r2, Ec, Es = _dog_parts(p, pr.x, pr.y)
    a = kc * Ec * 2 / rc**2
    b = ks * Es * 2 / rs**2
    J = np.empty((pr.n, 6))
    J[:, 0] = (a - b) * dx
    J[:, 1] = (a - b) * dy
    J[:, 2] = Ec
    J[:, 3] = kc * Ec * 2 * r2 / rc**3 - ks * Es * 2 * r2 / rs**3 * m
    J[:, 4] = -Es
    J[:, 5] = -ks * Es * 2 * r2 / rs**3 * rc
    return J * pr.w[:, None]


def _dog_setup(pr):
    """Starts and bounds of the DoG fit (internal parameters ``x0, y0, kc, rc, ks, rs / rc``)."""
    x0, y0, smaj, smin, th, A = pr.blob_start()
    rc = math.sqrt(2.0 * smaj * smin)  # exp(-r^2/rc^2) has sd rc / sqrt(2)
    rc = min(max(rc, 2 * pr.wmin), pr.wmax / 2)
    big = 1e3 * pr.scale
    sign = 1.0 if A >= 0 else -1.0
    if sign > 0:
        klo, khi = 0.0, big
    else:
        klo, khi = -big, 0.0
    lo = [pr.xlo, pr.ylo, klo, pr.wmin, klo, 1.05]
    hi = [pr.xhi, pr.yhi, khi, pr.wmax, khi, 2 * pr.wmax / pr.wmin]
    A = A if A != 0 else sign * pr.scale
    starts = [(x0, y0, 1.2 * A, rc, 0.2 * A / 4, 2.0), (x0, y0, 1.5 * A, 0.8 * rc, 0.5 * A / 9, 3.0)]
    return starts, lo, hi


def _dog_report(p):
    """Internal (x0, y0, kc, rc, ks, rs / rc) -> reported (x0, y0, kc, rc, ks, rs)."""
    x0, y0, kc, rc, ks, m = p
    return np.array([x0, y0, kc, rc, ks, rc * m])


def _fit_dog_pr(pr):
    if not _enough(pr, 6):
        return _empty_fit("dog", pr)
    starts, lo, hi = _dog_setup(pr)
    res = _solve(_dog_res, _dog_jac, starts, lo, hi, args=(pr,))
    if res is None:
        return _empty_fit("dog", pr)
    return _finish("dog", pr, dog2d, _dog_report(res.x))


# --------------------------------------------------------------------------------------------------
# Gabor
# --------------------------------------------------------------------------------------------------

def _gabor_parts(p, x, y):
    x0, y0, su, sv, kx, ky, a, b = p
    f = max(math.hypot(kx, ky), 1e-12)
    c, s = kx / f, ky / f
    dx, dy = x - x0, y - y0
    u = dx * c + dy * s
    v = -dx * s + dy * c
    E = np.exp(-0.5 * (u / su) ** 2 - 0.5 * (v / sv) ** 2)
    ph = 2 * np.pi * (kx * dx + ky * dy)
    cp, sp = np.cos(ph), np.sin(ph)
    return f, c, s, dx, dy, u, v, E, cp, sp


def _gabor_res(p, pr):
    f, c, s, dx, dy, u, v, E, cp, sp = _gabor_parts(p, pr.x, pr.y)
    return (E * (p[6] * cp + p[7] * sp) - pr.d) * pr.w


def _gabor_jac(p, pr):
    x0, y0, su, sv, kx, ky, a, b = p
    f, c, s, dx, dy, u, v, E, cp, sp = _gabor_parts(p, pr.x, pr.y)
    C = a * cp + b * sp
    S = -a * sp + b * cp           # dC/dphase
    EC, ES = E * C, E * S
    au, av = u / su**2, v / sv**2
    dq_dth = u * v * (1 / su**2 - 1 / sv**2)
    dth_dkx, dth_dky = -ky / f**2, kx / f**2
    tp = 2 * np.pi
    J = np.empty((pr.n, 8))
    # g = E C;  dg = E S dphase - E C dq
    J[:, 0] = ES * (-tp * kx) - EC * (-au * c + av * s)
    J[:, 1] = ES * (-tp * ky) - EC * (-au * s - av * c)
    J[:, 2] = EC * u**2 / su**3
    J[:, 3] = EC * v**2 / sv**3
    J[:, 4] = ES * tp * dx - EC * dq_dth * dth_dkx
    J[:, 5] = ES * tp * dy - EC * dq_dth * dth_dky
    J[:, 6] = E * cp
    J[:, 7] = E * sp
    return J * pr.w[:, None]


def _gabor_report(p):
    """Internal -> (x0, y0, su, sv, orientation_deg in [0,180), sf, phase_deg in [0,360), A > 0).

    ``E (a cos(phi) + b sin(phi)) = A E cos(phi + phase)`` with ``A = hypot(a, b)``,
    ``phase = atan2(-b, a)``. Turning the wave vector by 180 deg negates ``u`` and so the phase.
    """
    x0, y0, su, sv, kx, ky, a, b = p
    sf = math.hypot(kx, ky)
    ori = math.degrees(math.atan2(ky, kx))
    A = math.hypot(a, b)
    ph = math.degrees(math.atan2(-b, a))
    if ori < 0 or ori >= 180:
        ori = ori % 360.0
        if ori >= 180:
            ori -= 180.0
            ph = -ph
    return np.array([x0, y0, su, sv, ori % 180.0, sf, ph % 360.0, A])


def _gabor_amplitudes(pr, x0, y0, su, sv, kx, ky):
    """Best (a, b) for fixed envelope and wave vector (linear least squares)."""
    p = (x0, y0, su, sv, kx, ky, 0.0, 0.0)
    f, c, s, dx, dy, u, v, E, cp, sp = _gabor_parts(p, pr.x, pr.y)
    M = np.stack([E * cp, E * sp], axis=1) * pr.w[:, None]
    ab, *_ = np.linalg.lstsq(M, pr.d * pr.w, rcond=None)
    return float(ab[0]), float(ab[1])


def _gabor_setup(pr, n_peaks=3):
    """Starts and bounds of the Gabor fit (internal parameters ``x0, y0, su, sv, kx, ky, a, b``)."""
    lo = [pr.xlo, pr.ylo, pr.wmin, pr.wmin, -pr.nyq_x, -pr.nyq_y, -np.inf, -np.inf]
    hi = [pr.xhi, pr.yhi, pr.wmax, pr.wmax, pr.nyq_x, pr.nyq_y, np.inf, np.inf]
    # envelope from the local energy (smoothed squared map)
    e2 = ndimage.gaussian_filter(np.where(pr.ok, pr.map, 0.0) ** 2, 1.0, mode="constant")
    i, j = np.unravel_index(np.argmax(e2), e2.shape)
    w = np.where(e2 > 0.2 * e2[i, j], e2, 0.0)
    lab, _ = ndimage.label(w > 0)
    w = np.where(lab == lab[i, j], w, 0.0)
    tot = w.sum()
    ex = (w * pr.X).sum() / tot
    ey = (w * pr.Y).sum() / tot
    var = 0.5 * ((w * ((pr.X - ex) ** 2 + (pr.Y - ey) ** 2)).sum() / tot)
    # E^2 has half the variance of E; a cut at 0.2 of the peak keeps about 0.6 of it
    s0 = float(np.clip(math.sqrt(2 * var / 0.6), 2 * pr.wmin, pr.wmax / 2))
    starts = []
    for kx, ky in pr.spectral_peaks(n_peaks):
        f = math.hypot(kx, ky)
        if f == 0:
            continue
        s_use = s0
        a, b = _gabor_amplitudes(pr, ex, ey, s_use, s_use, kx, ky)
        starts.append((ex, ey, s_use, s_use, kx, ky, a, b))
    return starts, lo, hi


def _fit_gabor_pr(pr, n_peaks=3):
    if not _enough(pr, 8):
        return _empty_fit("gabor", pr)
    starts, lo, hi = _gabor_setup(pr, n_peaks)
    res = _solve(_gabor_res, _gabor_jac, starts, lo, hi, args=(pr,))
    if res is None:
        return _empty_fit("gabor", pr)
    return _finish("gabor", pr, gabor2d, _gabor_report(res.x))


# --------------------------------------------------------------------------------------------------
# public API
# --------------------------------------------------------------------------------------------------

_FITTERS = {"gaussian": _fit_gaussian_pr, "dog": _fit_dog_pr, "gabor": _fit_gabor_pr}


def fit_gaussian(map_yx, grid, noise_sd=None) -> SpatialFit:
    """Fit an elliptical 2-D Gaussian (:func:`map2d.models.gaussian2d`) to a map.

    Parameters
    ----------
    map_yx : array_like, shape (ny, nx)
        The map on ``grid`` (row 0 at the top); non-finite pixels are ignored.
    grid : map2d.geometry.Grid
        Pixel positions in degrees.
    noise_sd : float or array_like (ny, nx), optional
        Standard deviation of the map's noise per pixel (e.g. from a shuffle null). Weights the fit
        and makes the AIC a known-variance likelihood; ``None`` estimates it from the residuals.

    Returns
    -------
    SpatialFit
        Parameters ``center_x_deg, center_y_deg, sigma_major_deg, sigma_minor_deg, theta_deg,
        amplitude`` (NaN when the map has too few finite, non-constant pixels).

    Examples
    --------
    >>> from map2d.geometry import Grid
    >>> from map2d.models import gaussian2d
    >>> g = Grid(ny=15, nx=21, center_x_deg=5.0, center_y_deg=-3.0, dx_deg=1.0, dy_deg=1.0)
    >>> X, Y = g.mesh_deg()
    >>> f = fit_gaussian(gaussian2d(X, Y, 7.0, -1.0, 3.0, 1.5, 30.0), g)
    >>> [round(f.params[k], 3) for k in ("center_x_deg", "center_y_deg", "sigma_major_deg", "theta_deg")]
    [7.0, -1.0, 3.0, 30.0]
    """
    return _fit_gaussian_pr(_Problem(map_yx, grid, noise_sd))


def fit_dog(map_yx, grid, noise_sd=None) -> SpatialFit:
    """Fit a difference of Gaussians (:func:`map2d.models.dog2d`, Enroth-Cugell & Robson 1966).

    The sign of the centre (ON: ``kc, ks >= 0``; OFF: ``kc, ks <= 0``) is taken from the peak of the
    lightly smoothed map; the surround is constrained wider than the centre (``rs >= 1.05 rc``).
    Parameters and returns as :func:`fit_gaussian`; parameters ``center_x_deg, center_y_deg, kc,
    rc_deg, ks, rs_deg``.
    """
    return _fit_dog_pr(_Problem(map_yx, grid, noise_sd))


def fit_gabor(map_yx, grid, noise_sd=None) -> SpatialFit:
    """Fit a Gabor (:func:`map2d.models.gabor2d`, Jones & Palmer 1987).

    Starts from the three largest peaks of the zero-padded power spectrum for the wave vector, the
    local energy for the envelope and a linear solve for amplitude and phase. Orientation is the
    wave-vector angle folded into [0, 180) (contract), the phase adjusted consistently (turning the
    wave vector by 180 deg negates it) and reported in [0, 360) relative to the envelope centre, with
    a positive amplitude. Parameters and returns as :func:`fit_gaussian`; parameters
    ``center_x_deg, center_y_deg, sigma_u_deg, sigma_v_deg, orientation_deg, sf_cpd, phase_deg,
    amplitude``.
    """
    return _fit_gabor_pr(_Problem(map_yx, grid, noise_sd))


def fit_map(map_yx, grid, noise_sd=None, models=MODELS, criterion="bic") -> SpatialFit:
    """Fit several models and return the best by an information criterion.

    Parameters
    ----------
    map_yx, grid, noise_sd
        As :func:`fit_gaussian`.
    models : sequence of str
        Any of ``'gaussian'``, ``'dog'``, ``'gabor'``.
    criterion : {'bic', 'aic'}
        Which criterion chooses (module notes; BIC by default). Both are reported for every model
        tried.

    Returns
    -------
    SpatialFit
        The chosen model's fit, with ``aic`` and ``bic`` holding every model tried (NaN for a model
        that could not be fitted). A map that cannot be fitted at all gives the first model's NaN fit.
    """
    models = tuple(models)
    if not models or any(m not in _FITTERS for m in models):
        raise ValueError(f"models must be a non-empty subset of {MODELS}, got {models!r}")
    if criterion not in ("aic", "bic"):
        raise ValueError(f"criterion must be 'aic' or 'bic', got {criterion!r}")
    pr = _Problem(map_yx, grid, noise_sd)
    return _choose({m: _FITTERS[m](pr) for m in models}, models, criterion)


def _choose(fits, models, criterion):
    """The fit of the model with the lowest criterion among ``fits`` (one per model, one map)."""
    aic = {m: f.aic[m] for m, f in fits.items()}
    bic = {m: f.bic[m] for m, f in fits.items()}
    score = aic if criterion == "aic" else bic
    finite = [m for m in models if np.isfinite(score[m])]
    best = min(finite, key=lambda m: score[m]) if finite else models[0]
    out = fits[best]
    out.aic, out.bic, out.criterion = aic, bic, criterion
    return out


#: The optimiser of the many-cell fits (:func:`fit_maps`, :func:`locate_fields`): ``'batched'`` advances
#: every cell and start together (:mod:`map2d.fit.batched`); ``'reference'`` is
#: :func:`scipy.optimize.least_squares` one map at a time (the single-map functions always use it).
SOLVERS = ("batched", "reference")


def _fit_all(problems, models, solver="batched", needed=None, intervals=True):
    """Every model fitted to every problem: ``{model: [SpatialFit, ...]}`` (the problems share a grid).

    ``needed(fits)``: per model, the problems whose fit can be reported (the batched solver then runs only
    those to convergence, :func:`map2d.fit.batched.fit_choosing`); None: every fit converged.
    ``intervals=False``: the batched solver leaves the intervals out (NaN; for callers that use the
    parameters only)."""
    if solver not in SOLVERS:
        raise ValueError(f"solver must be one of {SOLVERS}, got {solver!r}")
    if solver == "reference":
        return {m: [_FITTERS[m](pr) for pr in problems] for m in models}
    from .batched import fit_choosing, fit_models
    if needed is not None and len(models) > 1:
        return fit_choosing(problems, models, needed)
    return {m: fit_models(problems, m, intervals) for m in models}


#: A model whose fit was not run to convergence is continued when its BIC is within this many units of
#: the reported model's (it could still overtake it); beyond, its shorter run decided already
#: (:func:`map2d.fit.batched.fit_choosing`). Measured on the benchmark's all-responsive session, a simulated
#: session of 200 cells and the held-out generator's sessions: continuing such fits to convergence lowered
#: their BIC by at most 2.5 units.
REFINE_MARGIN_BIC = 6.0


def _near(bic, models, ref):
    """Models whose BIC is finite and at most :data:`REFINE_MARGIN_BIC` above ``ref``."""
    return [m for m in models if np.isfinite(bic[m]) and bic[m] <= ref + REFINE_MARGIN_BIC]


def _needed_choice(fits, models, criterion):
    """:func:`_fit_all`'s ``needed`` for :func:`_choose`: each problem's best model and those near it."""
    need = {m: [] for m in models}
    for c in range(len(fits[models[0]])):
        score = {m: fits[m][c].aic[m] if criterion == "aic" else fits[m][c].bic[m] for m in models}
        finite = [score[m] for m in models if np.isfinite(score[m])]
        for m in _near(score, models, min(finite)) if finite else models:
            need[m].append(c)
    return need


def _needed_checked(fits, models, check):
    """:func:`_fit_all`'s ``needed`` for :func:`_checked_choice` (``check(fit, c)``: :func:`fit_check` of
    problem ``c``): the models ranked up to the accepted one (all when none is), and those near it."""
    need = {m: [] for m in models}
    for c in range(len(fits[models[0]])):
        bic = {m: fits[m][c].bic[m] for m in models}
        ranked = sorted((m for m in models if np.isfinite(bic[m])), key=lambda m: bic[m])
        take, accepted = [], False
        for m in ranked:                      # as _checked_choice walks them
            if bic[m] - bic[ranked[0]] > MAX_FALLBACK_BIC:
                break
            take.append(m)
            if not check(fits[m][c], c):
                accepted = True
                break
        if not accepted:
            take = list(models)              # none accepted: every model's fit can change that
        ref = max((bic[m] for m in take if np.isfinite(bic[m])), default=np.inf)
        for m in set(take) | set(_near(bic, models, ref)):
            need[m].append(c)
    return need


# --------------------------------------------------------------------------------------------------
# the pixel aperture
# --------------------------------------------------------------------------------------------------

def _box_cov(grid):
    """Covariance of the uniform pixel box (``dx^2 / 12``, ``dy^2 / 12``): its Gaussian approximation."""
    return np.diag([grid.dx_deg**2 / 12.0, grid.dy_deg**2 / 12.0])


def _rot(theta_deg):
    th = math.radians(theta_deg)
    return np.array([[math.cos(th), -math.sin(th)], [math.sin(th), math.cos(th)]])


def _narrowed(width, b):
    """``sqrt(width^2 - b)``; NaN when the width does not exceed the box (not resolvable)."""
    w2 = width * width - b
    return math.sqrt(w2) if np.isfinite(w2) and w2 > 0 else np.nan


def _narrowed_ci(ci, b):
    lo, hi = ci
    lo2, hi2 = lo * lo - b if lo > 0 else -1.0, hi * hi - b
    if not (np.isfinite(lo2) and np.isfinite(hi2)) or hi2 <= 0:
        return (np.nan, np.nan)
    return (math.sqrt(lo2) if lo2 > 0 else 0.0, math.sqrt(hi2))


def remove_pixel_box(fit: SpatialFit, grid: Grid) -> SpatialFit:
    """The parameters of the kernel behind a map whose pixels average it over their area.

    A sparse-noise spot fills its grid pixel, so a sparse-noise map is the kernel integrated over each
    pixel: the kernel convolved with the pixel box, sampled at the pixel centres. A model fitted to the
    map therefore describes the box-blurred kernel: widths come out larger (for a DoG centre of radius
    ``rc`` on a grid of spacing ``d``, ``rc^2 + d^2 / 6``: +8 % at ``rc = d``) and a Gabor's frequency
    lower. This function undoes the box for the reported parameters, with the box replaced by the
    Gaussian of the same covariance, ``B = diag(dx^2, dy^2) / 12`` (its transform ``exp(-2 pi^2 f' B f)``
    matches ``sinc(kx dx) sinc(ky dy)`` to within 1 % below 0.3 cycles per pixel). Gaussians convolved
    with Gaussians stay Gaussian, so every model has a closed form (Bracewell, The Fourier Transform and
    Its Applications, convolution theorem and Gaussian transform pairs):

    - Gaussian: envelope covariance ``S = S' - B`` (``S'`` fitted), amplitude times
      ``sqrt(det S' / det S)`` (the integral is kept);
    - DoG: each component ``exp(-r^2 / r^2)`` has variance ``r^2 / 2`` per axis, so
      ``r^2 = r'^2 - (dx^2 + dy^2) / 12`` (the box's mean variance; exact for square pixels), and its peak
      ``k = k' r'^2 / r^2``;
    - Gabor: the blurred Gabor has envelope ``S' = S + B``, wave vector ``k' = S'^-1 S k`` and the same
      phase about the envelope centre, with amplitude ``A' = A sqrt(det S / det S')
      exp(-2 pi^2 k^T S S'^-1 B k)``; inverted here (``k = S^-1 S' k'``). The reported widths are the
      envelope's sds along and across the new wave vector (exact for square pixels).

    The centre is unchanged (the box is symmetric). Confidence intervals of widths and SF are mapped
    endpoint by endpoint with the other parameters held at their estimates; a lower width endpoint inside
    the box becomes 0. A width not larger than the box's sd along it cannot be resolved: it becomes NaN
    (and so do the parameters that depend on it). The fitted model map (``predicted``) is unchanged: it is
    the model of the map, blurred.

    Parameters
    ----------
    fit : SpatialFit
        A fit to a map on ``grid`` (any model).
    grid : Grid

    Returns
    -------
    SpatialFit
        A new fit with the kernel's parameters and intervals.

    Examples
    --------
    >>> from map2d.geometry import Grid
    >>> g = Grid(ny=9, nx=9, center_x_deg=0.0, center_y_deg=0.0, dx_deg=2.0, dy_deg=2.0)
    >>> f = SpatialFit("dog", {"center_x_deg": 0.0, "center_y_deg": 0.0, "kc": 1.0,
    ...                "rc_deg": 2.0, "ks": 0.1, "rs_deg": 5.0}, {}, {}, float("nan"), None)
    >>> round(remove_pixel_box(f, g).params["rc_deg"] ** 2, 6)   # 4 - (4 + 4) / 12
    3.333333
    """
    p = dict(fit.params)
    ci = {k: tuple(v) for k, v in fit.ci.items()}
    nan2 = (np.nan, np.nan)
    B = _box_cov(grid)
    if fit.model == "dog":
        b = float(np.trace(B))          # r'^2 / 2 = r^2 / 2 + (mean box variance per axis)
        for k_name, r_name in (("kc", "rc_deg"), ("ks", "rs_deg")):
            r1 = p[r_name]
            r0 = _narrowed(r1, b)
            p[k_name] = p[k_name] * r1**2 / r0**2 if np.isfinite(r0) else np.nan
            p[r_name] = r0
            ci[r_name] = _narrowed_ci(ci.get(r_name, nan2), b)
            ci[k_name] = nan2
    elif fit.model == "gaussian":
        a1, b1, th = p["sigma_major_deg"], p["sigma_minor_deg"], p["theta_deg"]
        R = _rot(th)
        S1 = R @ np.diag([a1**2, b1**2]) @ R.T
        S0 = S1 - B
        ev, evec = np.linalg.eigh(S0)
        ok = bool(np.all(np.isfinite(ev)) and ev[0] > 0)
        u, v = R[:, 0], R[:, 1]
        if ok:
            p["sigma_major_deg"], p["sigma_minor_deg"] = float(np.sqrt(ev[1])), float(np.sqrt(ev[0]))
            p["theta_deg"] = float(math.degrees(math.atan2(evec[1, 1], evec[0, 1])) % 180.0)
            p["amplitude"] = p["amplitude"] * math.sqrt(np.linalg.det(S1) / np.linalg.det(S0))
        else:
            p.update(sigma_major_deg=np.nan, sigma_minor_deg=np.nan, theta_deg=np.nan, amplitude=np.nan)
        ci["sigma_major_deg"] = _narrowed_ci(ci.get("sigma_major_deg", nan2), float(u @ B @ u))
        ci["sigma_minor_deg"] = _narrowed_ci(ci.get("sigma_minor_deg", nan2), float(v @ B @ v))
        if ok:
            shift = p["theta_deg"] - th
            lo, hi = ci.get("theta_deg", nan2)
            ci["theta_deg"] = (lo + shift, hi + shift)
        else:
            ci["theta_deg"] = nan2
        ci["amplitude"] = nan2
    elif fit.model == "gabor":
        su1, sv1, th, f1 = p["sigma_u_deg"], p["sigma_v_deg"], p["orientation_deg"], p["sf_cpd"]
        R = _rot(th)
        S1 = R @ np.diag([su1**2, sv1**2]) @ R.T
        S0 = S1 - B
        ok = bool(np.all(np.isfinite(S0)) and np.all(np.linalg.eigvalsh(S0) > 0))
        if ok:
            k1 = f1 * R[:, 0]
            k0 = np.linalg.solve(S0, S1 @ k1)
            f0 = float(np.hypot(*k0))
            n = k0 / f0
            m = np.array([-n[1], n[0]])
            ori = math.degrees(math.atan2(k0[1], k0[0]))
            ph = p["phase_deg"]
            if ori < 0 or ori >= 180:               # fold as the fit does: turning k by 180 negates phase
                ori = ori % 360.0
                if ori >= 180:
                    ori -= 180.0
                    ph = -ph
            amp = p["amplitude"] * math.sqrt(np.linalg.det(S1) / np.linalg.det(S0)) * math.exp(
                2 * math.pi**2 * float(k0 @ S0 @ np.linalg.solve(S1, B @ k0)))
            scale = f0 / f1
            lo, hi = ci.get("sf_cpd", nan2)
            ci["sf_cpd"] = (lo * scale, hi * scale)
            shift = ((ori - th + 90.0) % 180.0) - 90.0
            lo, hi = ci.get("orientation_deg", nan2)
            ci["orientation_deg"] = (lo + shift, hi + shift)
            p.update(sigma_u_deg=float(np.sqrt(n @ S0 @ n)), sigma_v_deg=float(np.sqrt(m @ S0 @ m)),
                     orientation_deg=ori % 180.0, sf_cpd=f0, phase_deg=ph % 360.0, amplitude=amp)
        else:
            p.update(sigma_u_deg=np.nan, sigma_v_deg=np.nan, orientation_deg=np.nan, sf_cpd=np.nan,
                     phase_deg=np.nan, amplitude=np.nan)
            for k in ("sf_cpd", "orientation_deg", "phase_deg"):
                ci[k] = nan2
        u, v = R[:, 0], R[:, 1]
        ci["sigma_u_deg"] = _narrowed_ci(ci.get("sigma_u_deg", nan2), float(u @ B @ u))
        ci["sigma_v_deg"] = _narrowed_ci(ci.get("sigma_v_deg", nan2), float(v @ B @ v))
        ci["amplitude"] = nan2
    else:
        raise ValueError(f"unknown model {fit.model!r}")
    return SpatialFit(model=fit.model, params=p, ci=ci, aic=dict(fit.aic), r2=fit.r2,
                      predicted=fit.predicted, bic=dict(fit.bic), criterion=fit.criterion,
                      n_pixels=fit.n_pixels, ci_equal_noise=dict(fit.ci_equal_noise))


# --------------------------------------------------------------------------------------------------
# many cells
# --------------------------------------------------------------------------------------------------

FIT_COLUMNS = (
    "model", "center_x_deg", "center_y_deg",
    "center_x_ci_low_deg", "center_x_ci_high_deg", "center_y_ci_low_deg", "center_y_ci_high_deg",
    "size_deg", "fit_sign", "amplitude",
    "sigma_major_deg", "sigma_minor_deg", "theta_deg",
    "sigma_major_ci_low_deg", "sigma_major_ci_high_deg", "sigma_minor_ci_low_deg", "sigma_minor_ci_high_deg",
    "theta_ci_low_deg", "theta_ci_high_deg",
    "rc_deg", "rs_deg", "dog_kc", "dog_ks",
    "rc_ci_low_deg", "rc_ci_high_deg", "rs_ci_low_deg", "rs_ci_high_deg",
    "gabor_orientation_deg", "gabor_sf_cpd", "gabor_phase_deg", "gabor_sigma_u_deg",
    "gabor_sigma_v_deg",
    "gabor_orientation_ci_low_deg", "gabor_orientation_ci_high_deg", "gabor_sf_ci_low_cpd", "gabor_sf_ci_high_cpd",
    "gabor_phase_ci_low_deg", "gabor_phase_ci_high_deg",
    "r2", "aic_gaussian", "aic_dog", "aic_gabor", "bic_gaussian", "bic_dog", "bic_gabor",
)
"""Columns returned by :func:`fit_maps`, in order (for ``cells.csv``)."""


def _row(fit: SpatialFit) -> dict:
    """One cells.csv row (NaN where the chosen model has no such parameter)."""
    row = {c: np.nan for c in FIT_COLUMNS}
    row["model"] = fit.model
    p, ci = fit.params, fit.ci

    def put(col, name, ci_col=None):
        row[col] = p[name]
        if ci_col is not None:   # "<quantity>_ci_low_<unit>", the unit of col's suffix
            unit = col.rsplit("_", 1)[1]
            row[f"{ci_col}_ci_low_{unit}"], row[f"{ci_col}_ci_high_{unit}"] = ci[name]

    put("center_x_deg", "center_x_deg", "center_x")
    put("center_y_deg", "center_y_deg", "center_y")
    if fit.model == "gaussian":
        put("sigma_major_deg", "sigma_major_deg", "sigma_major")
        put("sigma_minor_deg", "sigma_minor_deg", "sigma_minor")
        put("theta_deg", "theta_deg", "theta")
        put("amplitude", "amplitude")
        row["size_deg"] = math.sqrt(p["sigma_major_deg"] * p["sigma_minor_deg"])
        row["fit_sign"] = float(np.sign(p["amplitude"])) if np.isfinite(p["amplitude"]) else np.nan
    elif fit.model == "dog":
        put("rc_deg", "rc_deg", "rc")
        put("rs_deg", "rs_deg", "rs")
        put("dog_kc", "kc")
        put("dog_ks", "ks")
        row["size_deg"] = p["rc_deg"] / math.sqrt(2.0)
        row["fit_sign"] = float(np.sign(p["kc"])) if np.isfinite(p["kc"]) and p["kc"] != 0 else np.nan
    elif fit.model == "gabor":
        su, sv = p["sigma_u_deg"], p["sigma_v_deg"]
        if su >= sv:
            put("sigma_major_deg", "sigma_u_deg", "sigma_major")
            put("sigma_minor_deg", "sigma_v_deg", "sigma_minor")
            row["theta_deg"] = p["orientation_deg"]
        else:
            put("sigma_major_deg", "sigma_v_deg", "sigma_major")
            put("sigma_minor_deg", "sigma_u_deg", "sigma_minor")
            row["theta_deg"] = (p["orientation_deg"] + 90.0) % 180.0
        row["theta_ci_low_deg"], row["theta_ci_high_deg"] = (
            ci["orientation_deg"][0] + (row["theta_deg"] - p["orientation_deg"]),
            ci["orientation_deg"][1] + (row["theta_deg"] - p["orientation_deg"]))
        put("amplitude", "amplitude")
        put("gabor_orientation_deg", "orientation_deg", "gabor_orientation")
        put("gabor_sf_cpd", "sf_cpd", "gabor_sf")
        put("gabor_phase_deg", "phase_deg", "gabor_phase")
        put("gabor_sigma_u_deg", "sigma_u_deg")
        put("gabor_sigma_v_deg", "sigma_v_deg")
        row["size_deg"] = math.sqrt(su * sv)
    row["r2"] = fit.r2
    for m in MODELS:
        row["aic_" + m] = float(fit.aic.get(m, np.nan))
        row["bic_" + m] = float(fit.bic.get(m, np.nan))
    return row


def _fit_chunk(maps, grid, noise_sd, models, criterion, pixel_box=False, solver="batched"):
    models = tuple(models)
    if not models or any(m not in _FITTERS for m in models):
        raise ValueError(f"models must be a non-empty subset of {MODELS}, got {models!r}")
    if criterion not in ("aic", "bic"):
        raise ValueError(f"criterion must be 'aic' or 'bic', got {criterion!r}")
    problems = []
    for c in range(maps.shape[0]):
        sd = None if noise_sd is None else noise_sd[c]
        if sd is not None and not np.all(np.isfinite(sd) & (np.asarray(sd) > 0)):
            sd = None   # unusable noise estimate: fall back to the residuals
        problems.append(_Problem(maps[c], grid, sd))
    fits = _fit_all(problems, models, solver, lambda f: _needed_choice(f, models, criterion))
    rows, predicted = [], []
    for c in range(maps.shape[0]):
        fit = _choose({m: fits[m][c] for m in models}, models, criterion)
        rows.append(_row(remove_pixel_box(fit, grid) if pixel_box else fit))
        predicted.append(np.asarray(fit.predicted, dtype=float))
    return rows, predicted


@with_one_blas_thread      # many small matrices: BLAS threads cost more than they compute (map2d._blas)
def fit_maps(maps, grid, responsive, noise_sd=None, n_jobs=None, models=MODELS,
             criterion="bic", return_predicted=False, pixel_box=False, solver="batched"):
    """Fit every responsive cell's map; columns for ``cells.csv``.

    Parameters
    ----------
    maps : array_like, shape (C, ny, nx)
        One map per cell (e.g. the linear map at the peak lag), on ``grid``.
    grid : map2d.geometry.Grid
    responsive : array_like of bool, shape (C,)
        Only these cells are fitted; the others get NaN everywhere and ``model = ''`` (empty, not
        invented).
    noise_sd : array_like, shape (C,) or (C, ny, nx), optional
        Noise sd of each cell's map (module notes); ``None`` estimates it from the residuals, as
        does a non-finite or non-positive entry for a cell.
    n_jobs : int, optional
        Worker processes. Default: 1 below :data:`POOL_MIN_CELLS` responsive cells, otherwise 2 (each
        worker fits its share of the cells as one batch).
    models, criterion
        As :func:`fit_map`.
    solver : {'batched', 'reference'}
        The optimiser (:data:`SOLVERS`): every cell at once (:mod:`map2d.fit.batched`, default) or
        :func:`scipy.optimize.least_squares` one map at a time (the reference; the same starts, bounds,
        criteria and intervals).
    return_predicted : bool
        Also return the fitted models evaluated on the grid, ``(C, ny, nx)`` (NaN when not fitted).
    pixel_box : bool
        The maps average the kernel over each pixel (sparse-noise spots fill their pixel): report the
        kernel's parameters with the box removed (:func:`remove_pixel_box`). The predicted maps are the
        fits to the maps either way.

    Returns
    -------
    dict of str to numpy.ndarray (and the predicted maps when ``return_predicted``)
        Every name in :data:`FIT_COLUMNS`, each of length ``C``: ``model`` (str; the chosen model),
        centre and its 95 % interval, ``size_deg`` (geometric-mean envelope sd; for the DoG the centre's
        sd ``rc / sqrt(2)``), ``fit_sign`` (+1 ON / -1 OFF for Gaussian and DoG, NaN for the Gabor),
        ``amplitude`` (Gaussian, Gabor), ``sigma_major_deg``, ``sigma_minor_deg``, ``theta_deg``
        (Gaussian, or the Gabor's envelope; major-axis angle in [0, 180)), ``rc_deg``, ``rs_deg``,
        ``dog_kc``, ``dog_ks`` (DoG), ``gabor_*`` (Gabor), ``r2`` and the AIC and BIC of each model
        tried (NaN for a model not tried).
        Interval columns ``<quantity>_ci_low_<unit>`` / ``<quantity>_ci_high_<unit>`` (e.g.
        ``center_x_ci_low_deg``) share the unit of their parameter.
        NaN where the chosen model has no such parameter.
    """
    maps = np.asarray(maps, dtype=float)
    if maps.ndim != 3 or maps.shape[1:] != grid.shape:
        raise ValueError(f"maps must have shape (cells, {grid.ny}, {grid.nx}), got {maps.shape}")
    C = maps.shape[0]
    resp = np.asarray(responsive, dtype=bool).reshape(-1)
    if resp.shape != (C,):
        raise ValueError(f"responsive must have one entry per map ({C}), got {resp.shape}")
    sd = None
    if noise_sd is not None:
        sd = np.asarray(noise_sd, dtype=float)
        if sd.shape not in ((C,), maps.shape):
            raise ValueError(f"noise_sd must have shape ({C},) or {maps.shape}, got {sd.shape}")
    idx = np.flatnonzero(resp)
    n_jobs = _n_workers(n_jobs, idx.size, solver)

    out = {c: np.full(C, np.nan) for c in FIT_COLUMNS}
    out["model"] = np.full(C, "", dtype=object)
    predicted = np.full(maps.shape, np.nan)
    if idx.size == 0:
        return (out, predicted) if return_predicted else out
    sub = maps[idx]
    subsd = None if sd is None else sd[idx]
    if n_jobs == 1:
        rows, preds = _fit_chunk(sub, grid, subsd, tuple(models), criterion, pixel_box, solver)
    else:
        chunks = np.array_split(np.arange(idx.size), n_jobs * (1 if solver == "batched" else 4))
        chunks = [ch for ch in chunks if ch.size]
        rows, preds = [], []
        with worker_pool(n_jobs) as ex:   # workers die with this process
            futs = [ex.submit(_fit_chunk, sub[ch], grid, None if subsd is None else subsd[ch],
                              tuple(models), criterion, pixel_box, solver) for ch in chunks]
            for fu in futs:
                r, p = fu.result()
                rows.extend(r)
                preds.extend(p)
    for k, row, pred in zip(idx, rows, preds):
        for c in FIT_COLUMNS:
            out[c][k] = row[c]
        predicted[k] = pred
    return (out, predicted) if return_predicted else out


# --------------------------------------------------------------------------------------------------
# does a fit earn its place
# --------------------------------------------------------------------------------------------------

#: Largest ratio of a fitted envelope's widths (major / minor sd) that is taken as physical.
MAX_ASPECT = 5.0
#: Smallest fitted width (sd, or a DoG centre's ``rc / sqrt(2)``), as a share of the pixel.
MIN_WIDTH_PIXELS = 1.0 / 3.0
#: How far (in pixels) beyond the grid's outer pixel edges a fitted centre may lie (one pixel let a
#: difference of two near-equal Gaussians fitted to a field cut by the edge place it 4 deg off).
CENTRE_MARGIN_PIXELS = 0.5
#: Smallest ``sf x sigma_u`` of an accepted Gabor: below it the carrier does not change sign within the
#: envelope's sd (``2 pi sf sigma_u < 0.63``), the fit is a blob with a phase ramp and its envelope centre
#: is not the field's (measured on thresholded fields; fitted 0.005-0.015 cpd with 1-2 deg widths).
MIN_GABOR_CYCLES = 0.1
#: Smallest share of the map's signal variance (above its noise) that an accepted fit explains.
MIN_SIGNAL_EXPLAINED = 0.5
#: Widest half-width of an accepted fit's 95 % centre interval, in pixels of each axis. A centre known no
#: better than +-1 pixel says no more than the significant region's centroid does; a Gabor cut by the
#: grid's edge trades its envelope centre against frequency and phase and read 0.4-2.6 pixels off with
#: intervals of +-3 to +-14 pixels (held-out edge sessions, docs/validation.md).
MAX_CENTRE_HALF_WIDTH_PIXELS = 1.0
#: Largest BIC by which a model may trail the best-ranked one and still stand in for it when that one is
#: rejected: 10, beyond which the evidence against it is "very strong" (Kass & Raftery 1995, J Am Stat
#: Assoc 90:773). A model the data decisively reject does not describe the map, and its centre is not the
#: field's: on the held-out sessions (seeds 0-9) a difference of Gaussians trailing a rejected Gabor by
#: 36-119 placed weak Gabors cut by the grid's edge or thresholded 0.6-1.4 pixels off, their significant
#: regions 0.01-0.31 pixel (benchmarks/centre_errors.py).
MAX_FALLBACK_BIC = 10.0


def _widths(fit: SpatialFit):
    """The fitted envelope's sds (model's own parameters, before the pixel box is removed)."""
    p = fit.params
    if fit.model == "gaussian":
        return p["sigma_major_deg"], p["sigma_minor_deg"]
    if fit.model == "dog":
        return p["rc_deg"] / math.sqrt(2.0), p["rc_deg"] / math.sqrt(2.0)
    return p["sigma_u_deg"], p["sigma_v_deg"]


def fit_check(fit: SpatialFit, map_yx, grid: Grid, noise_sd, alpha: float = 0.01) -> str:
    """Whether a fit earns its place: ``''`` when it does, otherwise the first reason it does not.

    A fitted centre and size are reported only when all of these hold (in this order):

    - ``'not above noise'``: the model removes more of the map's noise-weighted power than noise alone
      would, ``sum(d^2 / sd^2) - sum((d - m)^2 / sd^2) >= chi2_k^-1(1 - alpha)`` (likelihood-ratio test of
      the model against an empty map, ``k`` its parameters; Wilks 1938);
    - ``'explains too little'``: the model explains at least :data:`MIN_SIGNAL_EXPLAINED` of the map's
      signal variance, ``(TSS - RSS) / (TSS - sum sd^2)`` (the noise ceiling: the variance noise alone
      adds is not there to explain; common practice in receptive-field estimation, e.g. David &
      Gallant 2005, Network 16:239);
    - ``'too narrow'``: every width at least :data:`MIN_WIDTH_PIXELS` of a pixel (a field narrower than
      a third of a spot cannot be told from a single noisy pixel);
    - ``'elongated'``: aspect ratio at most :data:`MAX_ASPECT`;
    - ``'no carrier'`` (Gabor): ``sf x sigma_u >= MIN_GABOR_CYCLES``;
    - ``'centre off the grid'``: centre within the grid's outer pixel edges plus
      :data:`CENTRE_MARGIN_PIXELS`;
    - ``'no finite interval'``: finite 95 % intervals for the centre;
    - ``'centre not determined'``: each interval's half-width at most
      :data:`MAX_CENTRE_HALF_WIDTH_PIXELS` pixels of its axis (a field cut by the grid's edge can be fitted
      well with its centre anywhere along the cut). The intervals tested are the equal-noise (Wald) ones
      (``fit.ci_equal_noise``; the reported ones when absent): the test is of the model's geometry on the
      grid, and the limit was set on that scale. The reported (HC3) intervals, which add the map's
      unequal noise, are wider: tested instead, they sent 4 of 177 accepted fits of the benchmark session
      (benchmarks/bench_maps.py, fields near the edge) and 2 of 484 of the held-out sessions to the
      region's centroid, which placed 5 of the 6 worse (by 0.1-0.8 pixel; one 1.4 pixels off).

    Parameters
    ----------
    fit : SpatialFit
        The fit as :func:`fit_map` returns it (pixel box not removed).
    map_yx : array_like (ny, nx)
        The fitted map.
    grid : Grid
    noise_sd : float or array_like (ny, nx)
        Null sd of the map's pixels (response units). The sd of a single lag's map; the separable
        map pools lags and is no noisier, so the test errs on the side of rejecting.
    alpha : float
        Level of the test against noise.
    """
    from scipy.special import chdtri      # chi2.isf(alpha, k) = chdtri(k, alpha)

    if not fit.model or not np.isfinite(fit.center_x_deg) or fit.predicted is None:
        return "not fitted"
    d = np.asarray(map_yx, float)
    sd = np.broadcast_to(np.asarray(noise_sd, float), d.shape)
    m = np.asarray(fit.predicted, float)
    ok = np.isfinite(d) & np.isfinite(sd) & (sd > 0) & np.isfinite(m)
    if ok.sum() <= len(fit.params):
        return "not above noise"
    d, sd, m = d[ok], sd[ok], m[ok]
    gain = float(np.sum((d / sd) ** 2) - np.sum(((d - m) / sd) ** 2))
    if not gain >= chdtri(len(fit.params), alpha):
        return "not above noise"
    tss = float(np.sum((d - d.mean()) ** 2))
    signal = tss - float(np.sum(sd ** 2)) * (1 - 1 / d.size)
    rss = float(np.sum((d - m) ** 2))
    if not (signal > 0 and (tss - rss) / signal >= MIN_SIGNAL_EXPLAINED):
        return "explains too little"
    w = np.asarray(_widths(fit), float)
    pixel = min(grid.dx_deg, grid.dy_deg)
    if not (np.all(np.isfinite(w)) and w.min() >= MIN_WIDTH_PIXELS * pixel):
        return "too narrow"
    if fit.model != "dog" and not w.max() <= MAX_ASPECT * w.min():
        return "elongated"
    if fit.model == "gabor" and not fit.params["sf_cpd"] * fit.params["sigma_u_deg"] >= MIN_GABOR_CYCLES:
        return "no carrier"
    xs, ys = grid.x_deg, grid.y_deg
    mx, my = (0.5 + CENTRE_MARGIN_PIXELS) * grid.dx_deg, (0.5 + CENTRE_MARGIN_PIXELS) * grid.dy_deg
    if not (xs.min() - mx <= fit.center_x_deg <= xs.max() + mx and ys.min() - my <= fit.center_y_deg <= ys.max() + my):
        return "centre off the grid"
    ci = list(fit.ci.get("center_x_deg", (np.nan, np.nan))) + list(fit.ci.get("center_y_deg", (np.nan, np.nan)))
    if not np.all(np.isfinite(ci)):
        return "no finite interval"
    if fit.ci_equal_noise:      # the model's geometry on the grid, at the map's average noise
        ci = list(fit.ci_equal_noise["center_x_deg"]) + list(fit.ci_equal_noise["center_y_deg"])
    half = MAX_CENTRE_HALF_WIDTH_PIXELS
    if not (ci[1] - ci[0] <= 2 * half * grid.dx_deg and ci[3] - ci[2] <= 2 * half * grid.dy_deg):
        return "centre not determined"
    return ""


def fit_checked(map_yx, grid: Grid, check_map, check_sd, models=MODELS, alpha: float = 0.01):
    """Fit every model and keep the best (by BIC) that earns its place (:func:`fit_check`).

    A model ranked below a rejected one is taken only within :data:`MAX_FALLBACK_BIC` of the best-ranked
    model's BIC; beyond it none is accepted (the caller then locates the field by its region).

    Parameters
    ----------
    map_yx : array_like (ny, nx)
        The map that is fitted (e.g. the spatial part of a separable space-time map).
    grid : Grid
    check_map, check_sd : array_like (ny, nx)
        The map the fit is checked against, with the null sd of its pixels: the single-lag map that
        ``map_yx`` is scaled to, whose noise is known (the separable map pools lags and its noise is
        not).
    models : sequence of str
    alpha : float

    Returns
    -------
    (SpatialFit or None, str)
        The accepted fit (``aic`` and ``bic`` hold every model tried) and ``''``; or None and the
        reason the best-ranked model was rejected.
    """
    pr = _Problem(map_yx, grid, None)
    return _checked_choice({m: _FITTERS[m](pr) for m in models}, models, check_map, grid, check_sd, alpha)


def _checked_choice(fits, models, check_map, grid, check_sd, alpha, check=None):
    """:func:`fit_checked`'s choice among ``fits`` (one per model, one map); ``check(fit)``: its
    :func:`fit_check` computed already (else computed here)."""
    aic = {m: f.aic[m] for m, f in fits.items()}
    bic = {m: f.bic[m] for m, f in fits.items()}
    ranked = sorted((m for m in models if np.isfinite(bic[m])), key=lambda m: bic[m])
    first = "not fitted"
    for i, m in enumerate(ranked):
        if bic[m] - bic[ranked[0]] > MAX_FALLBACK_BIC:
            break                              # decisively worse than a rejected model: not the map's shape
        why = check(fits[m]) if check is not None else fit_check(fits[m], check_map, grid, check_sd, alpha)
        if not why:
            out = fits[m]
            out.aic, out.bic, out.criterion = aic, bic, "bic"
            return out, ""
        if i == 0:
            first = why
    return None, first


def _fit_checked_chunk(maps, grid, check_maps, check_sd, models, pixel_box, alpha, solver="batched"):
    """:func:`fit_checked` for each map: (rows or None, predicted maps or None, reasons)."""
    rows, predicted, reasons = [], [], []
    memo = {}

    def check(fit, c):            # fit_check of each fit once (fits refined later are new objects)
        if id(fit) not in memo:
            memo[id(fit)] = (fit, fit_check(fit, check_maps[c], grid, check_sd[c], alpha))
        return memo[id(fit)][1]

    fits = _fit_all([_Problem(m, grid, None) for m in maps], models, solver,
                    lambda f: _needed_checked(f, models, check))
    for c in range(maps.shape[0]):
        fit, why = _checked_choice({m: fits[m][c] for m in models}, models, check_maps[c], grid, check_sd[c],
                                   alpha, lambda f, c=c: check(f, c))
        reasons.append(why)
        if fit is None:
            rows.append(None)
            predicted.append(None)
            continue
        rows.append(_row(remove_pixel_box(fit, grid) if pixel_box else fit))
        predicted.append(np.asarray(fit.predicted, dtype=float))
    return rows, predicted, reasons


#: Fewest cells for which the fits are shared between two processes.
POOL_MIN_CELLS = 50


def _n_workers(n_jobs, n_cells, solver="batched"):
    """Processes for ``n_cells`` fits: ``n_jobs``, or 1 below :data:`POOL_MIN_CELLS` cells, else 2."""
    nj = n_jobs if n_jobs is not None else (1 if n_cells < POOL_MIN_CELLS else 2)
    return max(1, min(int(nj), os.cpu_count() or 1, max(n_cells, 1)))


def _in_parts(fn, args_of, n, n_jobs, solver="batched", ex=None, lazy=False):
    """``[fn(*args_of(part)) for part in parts]``: ``range(n)`` split into contiguous parts computed by
    ``n_jobs`` worker processes (:func:`map2d._forked.worker_pool`: they die with this process; ``fn`` a
    module-level function, ``args_of(part)`` its arguments for those cells only); one part per worker for
    the batched solver (each a batch), finer chunks for the reference solver. ``ex``: a pool to use (else
    one is started here). ``lazy``: submit the parts to ``ex`` now and return one callable per part that
    waits for its result (so that several stages queue on the same workers without a barrier between
    them); without a pool the callables compute their part when called."""
    if n == 0:
        return []
    if n_jobs <= 1:
        if lazy:
            return [lambda: fn(*args_of(np.arange(n)))]
        return [fn(*args_of(np.arange(n)))]
    per_worker = 1 if solver == "batched" else 4
    parts = [p for p in np.array_split(np.arange(n), n_jobs * per_worker) if p.size]
    if ex is not None:
        futs = [ex.submit(fn, *args_of(p)) for p in parts]
        return [f.result for f in futs] if lazy else [f.result() for f in futs]
    with worker_pool(n_jobs) as pool:   # workers die with this process
        return [f.result() for f in [pool.submit(fn, *args_of(p)) for p in parts]]


@dataclass
class CellFields:
    """Where each cell's field is, and how that was found (:func:`locate_fields`).

    Attributes
    ----------
    choice : map2d.maps.MapChoice
        Which map carries each cell and the map that was fitted.
    columns : dict of str to ndarray (C,)
        :data:`FIT_COLUMNS` (empty for cells without an accepted fit) with ``center_x_deg`` and
        ``center_y_deg`` filled for every responsive cell, plus ``center_method`` ('model', 'region' or
        '') and ``fit_check`` ('passed', the reason the fit was rejected, or '').
    model_maps : ndarray (C, ny, nx)
        The accepted fit evaluated on the grid; NaN where no fit was accepted.
    field_pixel : ndarray int (C, 2)
        ``(row, col)`` of the pixel nearest the centre; -1 when not responsive.
    onoff_overlap : ndarray (C,)
        Overlap of the fitted ON and OFF subfields at the peak lag (:func:`subfield_overlap`); NaN when
        not responsive or not estimable (dense noise).
    """

    choice: object
    columns: dict
    model_maps: np.ndarray
    field_pixel: np.ndarray
    onoff_overlap: np.ndarray


@with_one_blas_thread      # many small matrices: BLAS threads cost more than they compute (map2d._blas)
def locate_fields(result, n_jobs=None, alpha=None, pixel_box=True, solver="batched") -> CellFields:
    """Choose each responsive cell's map, fit it, keep the fit only if it earns its place, else use the
    region.

    Steps: :func:`map2d.maps.choose_maps` (linear or ON + OFF map, calibrated); the linear map is
    fitted with every model (BIC chooses), the ON + OFF map with a Gaussian envelope (location and
    extent only); :func:`fit_check` accepts or rejects each fit against the noise of the map at the
    peak lag; an accepted fit gives the centre (``center_method = 'model'``), otherwise the
    ``|z|``-weighted centroid of the significant cluster of the fitted (separable) map does
    (:func:`map2d.maps.region_centre` of :meth:`map2d.maps.MapChoice.region_z`,
    ``center_method = 'region'``) and the fit columns stay empty.

    Parameters
    ----------
    result : map2d.maps.MapResult
    n_jobs : int, optional
        Worker processes for the fits (as :func:`fit_maps`).
    alpha : float, optional
        Level of the regions and of the fit test (default ``result.alpha``).
    pixel_box : bool
        Report the kernel's parameters, the pixel box removed (:func:`remove_pixel_box`).
    solver : {'batched', 'reference'}
        The optimiser of every fit here, the subfields' included (as :func:`fit_maps`).

    Returns
    -------
    CellFields
    """
    from ..maps import choose_maps, region_centre

    alpha = result.alpha if alpha is None else float(alpha)
    grid = result.grid
    ch = choose_maps(result, alpha)
    C = result.n_cells
    out = {c: np.full(C, np.nan) for c in FIT_COLUMNS}
    out["model"] = np.full(C, "", dtype=object)
    out["center_method"] = np.full(C, "", dtype=object)
    out["fit_check"] = np.full(C, "", dtype=object)
    model_maps = np.full((C,) + grid.shape, np.nan)
    # one pool of worker processes for every stage below (started when first needed): fewer forks
    with contextlib.ExitStack() as stack:
        pools = {}

        def pool_for(nj):
            if nj <= 1:
                return None
            if "ex" not in pools:
                pools["ex"] = stack.enter_context(worker_pool(nj))
            return pools["ex"]

        maps = np.nan_to_num(ch.spatial)
        check = ch.z * ch.noise_sd                     # the chosen map at the peak lag
        # every stage's parts are queued on the workers at once (no barrier between stages), then collected
        pending = []
        for kind, models in (("linear", MODELS), ("on+off", ("gaussian",))):
            idx = np.flatnonzero(ch.kind == kind)
            if idx.size == 0:
                continue
            nj = _n_workers(n_jobs, idx.size, solver)
            pending.append((idx, _in_parts(
                _fit_checked_chunk, lambda part, idx=idx, models=models: (
                    maps[idx[part]], grid, check[idx[part]], ch.noise_sd[idx[part]], models, pixel_box, alpha, solver),
                idx.size, nj, solver, pool_for(nj), lazy=True)))
        overlap = np.full(C, np.nan)
        if result.stimulus == "sparse":
            cells = np.flatnonzero(result.peak_lag_index >= 0)
            nj = _n_workers(n_jobs, cells.size, solver)
            li = result.peak_lag_index[cells]

            def args_of(part):     # the peak-lag ON and OFF maps of these cells only
                c, lag = cells[part], li[part]
                return (result.on[c, lag], result.off[c, lag], result.on_z[c, lag], result.off_z[c, lag], grid,
                        ch.threshold_z, solver)

            overlap_parts = _in_parts(_overlaps, args_of, cells.size, nj, solver, pool_for(nj), lazy=True)
        for idx, parts in pending:
            rows, preds, why = [], [], []
            for r, p, w in (get() for get in parts):
                rows += r
                preds += p
                why += w
            for c, row, pred, reason in zip(idx, rows, preds, why):
                out["fit_check"][c] = reason or "passed"
                if row is not None:
                    for k in FIT_COLUMNS:
                        out[k][c] = row[k]
                    model_maps[c] = pred
                    out["center_method"][c] = "model"
                else:
                    x, y, _ = region_centre(ch.region_z(c), grid, ch.threshold_z)
                    out["center_x_deg"][c], out["center_y_deg"][c] = x, y
                    out["center_method"][c] = "region" if np.isfinite(x) else ""
        field_pixel = np.full((C, 2), -1, dtype=int)
        has = np.isfinite(out["center_x_deg"]) & np.isfinite(out["center_y_deg"])
        if has.any():
            r, c = grid.pixel_of(out["center_x_deg"][has], out["center_y_deg"][has])
            field_pixel[has, 0] = np.clip(np.rint(r), 0, grid.ny - 1).astype(int)
            field_pixel[has, 1] = np.clip(np.rint(c), 0, grid.nx - 1).astype(int)
        if result.stimulus == "sparse":
            parts = [get() for get in overlap_parts]
            overlap[cells] = np.concatenate(parts) if parts else []
    return CellFields(choice=ch, columns=out, model_maps=model_maps, field_pixel=field_pixel,
                      onoff_overlap=overlap)


# --------------------------------------------------------------------------------------------------
# ON/OFF overlap from fitted subfields
# --------------------------------------------------------------------------------------------------

def envelope_overlap(center1, cov1, center2, cov2) -> float:
    """Overlap of two Gaussian envelopes: their normalised inner product, 0-1.

    For ``g_k(x) = exp(-(x - m_k)^T S_k^-1 (x - m_k) / 2)``,
    ``<g1, g2> / sqrt(<g1, g1> <g2, g2>) = 2 (det S1 det S2)^(1/4) / sqrt(det(S1 + S2))
    exp(-d^T (S1 + S2)^-1 d / 2)`` with ``d = m1 - m2`` (Gaussian integrals: Bracewell, The Fourier
    Transform and Its Applications, Gaussian transform pairs). 1 for identical envelopes, falling
    with their distance in units of their widths; it does not depend on the amplitudes.

    Examples
    --------
    >>> S = np.eye(2)
    >>> round(envelope_overlap((0, 0), S, (0, 0), S), 6)
    1.0
    >>> round(envelope_overlap((0, 0), S, (2, 0), S), 4)        # exp(-4 / 4)
    0.3679
    """
    S1, S2 = np.asarray(cov1, float), np.asarray(cov2, float)
    d = np.asarray(center1, float) - np.asarray(center2, float)
    if not (np.all(np.isfinite(S1)) and np.all(np.isfinite(S2)) and np.all(np.isfinite(d))):
        return float("nan")
    Ssum = S1 + S2
    det1, det2, dets = np.linalg.det(S1), np.linalg.det(S2), np.linalg.det(Ssum)
    if not (det1 > 0 and det2 > 0 and dets > 0):
        return float("nan")
    return float(2 * (det1 * det2) ** 0.25 / math.sqrt(dets) * math.exp(-0.5 * d @ np.linalg.solve(Ssum, d)))


def _subfield(map_yx, z_yx, grid, threshold_z):
    """Gaussian envelope (centre, covariance) of one polarity's excitatory subfield, None when it has no
    significant pixel, NaN centre when its fit is not sane."""
    m = _lobe(map_yx, z_yx, threshold_z)
    return None if m is None else _envelope(fit_gaussian(m, grid), grid)


def _lobe(map_yx, z_yx, threshold_z):
    """The map inside the excitatory lobe holding the peak (0 elsewhere), None when no pixel reaches
    ``threshold_z``."""
    z = np.nan_to_num(np.asarray(z_yx, float))
    if not z.max() >= threshold_z:
        return None
    # the excitatory lobe holding the peak: its pixels of z >= 2 (8-connected), grown by one pixel of
    # positive z, so that two lobes of one polarity (the flanks of an even Gabor) are not taken for one
    # blob between them
    from ..maps import _component
    i, j = np.unravel_index(int(np.argmax(z)), z.shape)
    lobe = ndimage.binary_dilation(_component(z >= 2.0, i, j), structure=np.ones((3, 3), bool)) & (z > 0)
    return np.where(lobe, np.nan_to_num(np.asarray(map_yx, float)), 0.0)


def _lobes(maps, z, threshold_z):
    """:func:`_lobe` of every map of ``maps`` and ``z`` (n, ny, nx), computed together (the 8-connected
    component by one labelling of the stack, planes not connected to each other)."""
    z = np.nan_to_num(np.asarray(z, float))
    n = z.shape[0]
    if n == 0:
        return []
    flat = z.reshape(n, -1).argmax(axis=1)
    i, j = np.unravel_index(flat, z.shape[1:])
    plane = np.zeros((3, 3, 3), bool)
    plane[1] = True                                  # 3 x 3 within a plane, nothing across planes
    lab, _ = ndimage.label(z >= 2.0, structure=plane)
    peak_lab = lab[np.arange(n), i, j]
    comp = (lab == peak_lab[:, None, None]) & (peak_lab > 0)[:, None, None]
    lobe = ndimage.binary_dilation(comp, structure=plane) & (z > 0)
    vals = np.where(lobe, np.nan_to_num(np.asarray(maps, float)), 0.0)
    top = z.reshape(n, -1).max(axis=1)
    return [vals[c] if top[c] >= threshold_z else None for c in range(n)]


def _envelope(fit, grid):
    """(centre, covariance) of a Gaussian fitted to a lobe; NaN when the fit is not sane."""
    p = fit.params
    xs, ys = grid.x_deg, grid.y_deg
    mx, my = (0.5 + CENTRE_MARGIN_PIXELS) * grid.dx_deg, (0.5 + CENTRE_MARGIN_PIXELS) * grid.dy_deg
    ok = (np.isfinite(p["amplitude"]) and p["amplitude"] > 0
          and p["sigma_minor_deg"] >= MIN_WIDTH_PIXELS * min(grid.dx_deg, grid.dy_deg)
          and xs.min() - mx <= p["center_x_deg"] <= xs.max() + mx
          and ys.min() - my <= p["center_y_deg"] <= ys.max() + my)
    if not ok:
        return (np.array([np.nan, np.nan]), np.full((2, 2), np.nan))
    box = remove_pixel_box(fit, grid).params     # the kernel's envelope, pixel box removed
    if not np.isfinite(box["sigma_minor_deg"]):
        box = p
    R = _rot(box["theta_deg"])
    S = R @ np.diag([box["sigma_major_deg"] ** 2, box["sigma_minor_deg"] ** 2]) @ R.T
    return np.array([p["center_x_deg"], p["center_y_deg"]]), S


def _overlaps(on, off, on_z, off_z, grid, threshold_z, solver="batched"):
    """:func:`subfield_overlap` of each cell's maps (``on``, ``off``, ``on_z``, ``off_z``: (n, ny, nx)), every
    subfield fitted in one batch."""
    n = on.shape[0]
    both = np.empty((2 * n,) + on.shape[1:])
    both_z = np.empty_like(both)
    both[0::2], both[1::2], both_z[0::2], both_z[1::2] = on, off, on_z, off_z
    lobes = _lobes(both, both_z, threshold_z)
    todo = [i for i, m in enumerate(lobes) if m is not None]
    fits = _fit_all([_Problem(lobes[i], grid, None) for i in todo], ("gaussian",), solver,
                    intervals=False)["gaussian"]          # the envelopes use the parameters only
    env = [None] * len(lobes)
    for i, fit in zip(todo, fits):
        env[i] = _envelope(fit, grid)
    return np.array([_overlap_of(env[2 * j], env[2 * j + 1]) for j in range(on.shape[0])], float)


def subfield_overlap(on_map, off_map, on_z, off_z, grid: Grid, threshold_z: float) -> float:
    """ON/OFF overlap of a cell from its fitted excitatory subfields, 0 (segregated) to 1 (coextensive).

    The excitatory lobe of the ON map holding its peak (pixels of z >= 2 connected to it, grown by a
    pixel of positive z) and that of the OFF map are each fitted with a 2-D Gaussian; the overlap is that of the two fitted envelopes (:func:`envelope_overlap`, pixel box
    removed). It compares shapes and positions, not thresholded pixels, so it does not grow with the
    signal-to-noise ratio the way a cosine of thresholded z-maps does (after the subfield overlap of
    Schiller, Finlay & Volman 1976, J Neurophysiol 39:1288, and Mata & Ringach 2005, J Neurophysiol
    93:919). A polarity with no pixel reaching ``threshold_z`` has no subfield: the overlap is 0 when
    the other has one, NaN when neither has; NaN when a subfield's fit is not sane (narrower than a
    third of a pixel, off the grid, not excitatory).
    """
    return _overlap_of(_subfield(on_map, on_z, grid, threshold_z), _subfield(off_map, off_z, grid, threshold_z))


def _overlap_of(on, off):
    """:func:`subfield_overlap` from the two subfields (:func:`_subfield`)."""
    if on is None and off is None:
        return float("nan")
    if on is None or off is None:
        return 0.0
    return envelope_overlap(on[0], on[1], off[0], off[1])
