"""Experiment planner: how many minutes of sparse noise (or presentations of flashed gratings) a cell needs.

Sparse noise, a cell that has not been recorded yet
----------------------------------------------------
The planner's cell is a half-wave rectified linear cell with a circular Gaussian field of sd ``sigma``
(deg), normalised so that the optimal stimulus (a uniform bright field for a Gaussian) raises the rate
by ``peak_hz`` above the baseline, with a Gaussian temporal response (latency, sd) and Poisson spikes
at a mean rate ``rate_hz`` during the noise. From the estimator's variance:

- A spot filling one pixel of side ``dx x dy`` drives the field by
  ``d(u, v) = [Phi((dx/2 - u)/sigma) - Phi((-dx/2 - u)/sigma)] [same in y]`` (the Gaussian's mass over
  the pixel; ``u, v`` the field centre's offset from the pixel centre), and the response in the frame
  ``l`` frames later is ``peak_hz * w_l * d`` with ``w_l`` the share of the temporal response that falls
  into that frame (the temporal response convolved with the frame's box, averaged over the frame).
  The expected linear-map peak is the mean of ``peak_hz * w_peak * d(u, v)`` over centres uniform in the
  pixel (a dark spot on an ON field barely changes a rectified cell's rate: the OFF map there is ~0).
- The linear map is a difference of means of ``n_on = n_off = F K / (2 P)`` frame responses (``F``
  frames, ``K`` spots per frame, ``P`` pixels), so its noise sd is ``s sqrt(4 P / (F K))``, with ``s^2``
  the variance of one frame's response: ``rate_hz / T`` (Poisson counts in frames of ``T`` s, as
  spikes/s) plus the stimulus-driven variance ``peak_hz^2 (K / 2P) sum_l w_l^2 sum_p d_p^2``.
- ``z = peak / sd`` grows as ``sqrt(minutes)``; the minutes for a target z follow.
- Centre precision: the Cramer-Rao bound of each centre coordinate (Kay 1993, chapter 3), from the
  Fisher information ``sum over lags and pixels of (d m_lp / d x0)^2 / var_lp`` with the map
  ``m_lp = peak_hz w_l d_p`` and each value's own variance: the rate after a bright spot on the field
  is higher, so are its Poisson variance and its noise (``var_lp = ((rate + m_lp) / T + v_s) / n_on +
  (rate / T + v_s) / n_off``, ``v_s`` the stimulus-driven variance), RMS over field centres uniform in
  a pixel. For a low-baseline cell this heteroscedasticity doubles the sd of the centre of a field
  smaller than a pixel (white noise of the same z would give ``sqrt(2 a / pi) / z``, pixel area
  ``a``); the simulated fits follow the bound, not the white-noise value. It assumes the other free
  parameters (widths, amplitude) cost the centre nothing, true for a circular field sampled finely
  (5 % for a field of sd 0.6 pixels, computed).

Flashed gratings
----------------
``H`` is the first harmonic over the ``n_phases`` phases of the condition means (the least-squares fit
of ``c0 + c1 cos + c2 sin``), divided by the contrast; with equally spaced phases and ``n``
presentations of each, ``E|H - E H|^2 = (4 / n_phases) s^2 / (n contrast^2)``, ``s^2`` the variance of one
frame's response (``rate_hz / T`` for Poisson spikes).
A half-wave rectified cell modulated by ``peak_hz`` at the optimal grating has
``|H| = peak_hz w / 2`` in a frame holding the share ``w`` of its response (the first Fourier
coefficient of a half-wave rectified cosine is 1/2), and map2d pools the lags with the cell's time
course, so the lags' SNR^2 add. So ``n = (4 / n_phases) s^2 SNR^2 / (contrast^2 (peak_hz / 2)^2
sum_l w_l^2)`` presentations per condition reach a target ``SNR = |H| / sqrt(E|H - E H|^2)``. The
responses to neighbouring presentations add to ``s^2`` (``variance_factor``).

A recorded session
------------------
:func:`plan_session` scales what was measured: a map's z grows as the square root of the minutes, so
a cell at ``z`` after ``M`` minutes reaches ``Z`` after ``M (Z / z)^2`` minutes; a flashed surface's
SNR grows as the square root of the presentations. The measured z (the largest ``|z|`` of the linear
map at the peak lag) is biased upward when small (a maximum over pixels), so predictions for cells
near the significance threshold are optimistic; cells that are not responsive get none. For cells
whose map is ON + OFF (coextensive ON and OFF regions) the z is the largest ``|z|`` of any kind.

The test ``tests/test_plan.py`` checks the predictions against the simulator (:mod:`map2d.simulate`)
over a grid of settings: predicted peak z and centre precision within 25 % of the simulated outcome.

References
----------
Kay SM (1993) Fundamentals of Statistical Signal Processing: Estimation Theory. Prentice Hall.
Chichilnisky EJ (2001) A simple white noise analysis of neuronal light responses. Network 12:199-213.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.integrate import trapezoid
from scipy.special import ndtr

__all__ = ["NoiseProtocol", "PlannedCell", "temporal_shares", "predict_sparse_noise", "minutes_for_z",
           "flashed_presentations", "plan_session"]


@dataclass
class NoiseProtocol:
    """A sparse-noise protocol: grid ``ny x nx`` at ``dx_deg x dy_deg``, ``spots_per_frame`` spots
    (half bright, half dark on average), ``frame_rate_hz`` frames per second."""

    ny: int = 16
    nx: int = 24
    dx_deg: float = 2.0
    dy_deg: float = 2.0
    spots_per_frame: int = 4
    frame_rate_hz: float = 20.0

    def __post_init__(self):
        for name in ("ny", "nx", "spots_per_frame"):
            if int(getattr(self, name)) < 1:
                raise ValueError(f"{name} must be a positive integer, got {getattr(self, name)}")
        for name in ("dx_deg", "dy_deg", "frame_rate_hz"):
            v = float(getattr(self, name))
            if not (math.isfinite(v) and v > 0):
                raise ValueError(f"{name} must be positive, got {v}")


@dataclass
class PlannedCell:
    """The planner's cell (module docstring): mean rate during the noise, Gaussian field sd, rate above
    baseline at the optimal stimulus, latency and temporal sd of its response."""

    rate_hz: float
    field_sd_deg: float
    peak_hz: float
    latency_s: float = 0.05
    temporal_sd_s: float = 0.015

    def __post_init__(self):
        for name in ("rate_hz", "field_sd_deg", "peak_hz", "temporal_sd_s"):
            v = float(getattr(self, name))
            if not (math.isfinite(v) and v > 0):
                raise ValueError(f"{name} must be positive, got {v}")
        if not (math.isfinite(self.latency_s) and self.latency_s >= 0):
            raise ValueError(f"latency_s must be >= 0, got {self.latency_s}")


def temporal_shares(frame_s: float, latency_s: float, sd_s: float) -> np.ndarray:
    """Share of a one-frame stimulus's response that falls into each later frame, ``w_l``.

    A stimulus constant over one frame ``[0, T)`` and a response averaged over the frame ``[lT, (l+1)T)``:
    the weight of a response delay ``tau`` is the triangle ``max(0, 1 - |tau - lT| / T)``, averaged over
    the Gaussian delay (mean ``latency_s``, sd ``sd_s``), by the trapezoid rule on 4001 points over
    +-6 sd. The shares sum to 1 (every delay falls somewhere).

    Examples
    --------
    >>> w = temporal_shares(0.05, 0.05, 0.015)
    >>> int(np.argmax(w)), round(float(w.sum()), 4), round(float(w[1]), 3)
    (1, 1.0, 0.761)
    """
    T = float(frame_s)
    tau = np.linspace(latency_s - 6 * sd_s, latency_s + 6 * sd_s, 4001)
    pdf = np.exp(-0.5 * ((tau - latency_s) / sd_s) ** 2)
    pdf /= trapezoid(pdf, tau)
    n = int(np.ceil((latency_s + 6 * sd_s) / T)) + 2
    l = np.arange(n)[:, None] * T
    w = trapezoid(np.maximum(0.0, 1.0 - np.abs(tau[None] - l) / T) * pdf[None], tau, axis=1)
    return w


def _pixel_mass(sigma, d, u):
    """Mass of a unit Gaussian (sd ``sigma``) over a pixel of side ``d`` whose centre is ``u`` away."""
    return ndtr((d / 2 - u) / sigma) - ndtr((-d / 2 - u) / sigma)


def _centre_sd(pr, c, w, s2, F):
    """Cramer-Rao bound of each centre coordinate: Fisher information summed over pixels and lags with
    each pixel's own noise variance (Poisson: the rate after a bright spot on the field is higher), RMS
    over centre offsets uniform in a pixel (11 x 11 points)."""
    T = 1.0 / pr.frame_rate_hz
    P = pr.ny * pr.nx
    n_on = F * pr.spots_per_frame / (2.0 * P)                         # (M,) events per pixel and polarity
    s = c.field_sd_deg
    extra = s2 - c.rate_hz / T                                         # stimulus-driven variance
    hx = int(np.ceil(6 * s / pr.dx_deg)) + 1
    hy = int(np.ceil(6 * s / pr.dy_deg)) + 1
    info = []
    for u in (np.arange(11) + 0.5) / 11 - 0.5:
        xs = np.arange(-hx, hx + 1) * pr.dx_deg - u * pr.dx_deg
        gx = _pixel_mass(s, pr.dx_deg, xs)
        dgx = (np.exp(-0.5 * ((xs - pr.dx_deg / 2) / s) ** 2)
               - np.exp(-0.5 * ((xs + pr.dx_deg / 2) / s) ** 2)) / (math.sqrt(2 * math.pi) * s)
        for v in (np.arange(11) + 0.5) / 11 - 0.5:
            ys = np.arange(-hy, hy + 1) * pr.dy_deg - v * pr.dy_deg
            gy = _pixel_mass(s, pr.dy_deg, ys)
            d = np.outer(gy, gx)                                       # drive of each pixel
            dd = np.outer(gy, dgx)                                     # its derivative along x
            tot = 0.0
            for wl in w[w > 1e-6]:
                on_var = (c.rate_hz + c.peak_hz * wl * d) / T + extra
                var_unit = on_var + (c.rate_hz / T + extra)            # times 1 / n_on
                tot = tot + np.sum((c.peak_hz * wl * dd) ** 2 / var_unit)
            info.append(tot)
    info = np.asarray(info)[:, None] * np.atleast_1d(n_on)[None, :]
    return np.sqrt(np.mean(1.0 / info, axis=0)).reshape(np.shape(F))


def predict_sparse_noise(protocol: NoiseProtocol, cell: PlannedCell, minutes) -> dict:
    """Predicted peak z of the linear map and centre precision after ``minutes`` of sparse noise.

    Returns
    -------
    dict with ``z`` (expected peak z at the peak lag), ``center_sd_deg`` (sd of each fitted centre
    coordinate), ``spot_response_hz`` (linear-map peak in spikes/s), ``map_sd_hz`` (its noise sd), all
    arrays shaped like ``minutes``; and ``z_per_sqrt_minute``.
    """
    minutes = np.asarray(minutes, float)
    if np.any(~np.isfinite(minutes) | (minutes <= 0)):
        raise ValueError("minutes must be positive")
    pr, c = protocol, cell
    T = 1.0 / pr.frame_rate_hz
    P = pr.ny * pr.nx
    K = pr.spots_per_frame
    w = temporal_shares(T, c.latency_s, c.temporal_sd_s)
    wp = float(w.max())
    s = c.field_sd_deg
    # mean over centre offsets uniform in the pixel (midpoint rule, 41 points per axis)
    uu = (np.arange(41) + 0.5) / 41 - 0.5
    dmean = float(np.mean(_pixel_mass(s, pr.dx_deg, uu * pr.dx_deg))) * \
        float(np.mean(_pixel_mass(s, pr.dy_deg, uu * pr.dy_deg)))
    spot = c.peak_hz * wp * dmean
    # sum of squared pixel drives over a field centred on a pixel (the stimulus-driven variance)
    kx = np.arange(-int(6 * s / pr.dx_deg) - 1, int(6 * s / pr.dx_deg) + 2) * pr.dx_deg
    ky = np.arange(-int(6 * s / pr.dy_deg) - 1, int(6 * s / pr.dy_deg) + 2) * pr.dy_deg
    d2 = float(np.sum(_pixel_mass(s, pr.dx_deg, kx) ** 2)) * float(np.sum(_pixel_mass(s, pr.dy_deg, ky) ** 2))
    s2 = c.rate_hz / T + c.peak_hz ** 2 * (K / (2.0 * P)) * float(np.sum(w ** 2)) * d2
    F = minutes * 60.0 / T
    sd = np.sqrt(s2 * 4.0 * P / (F * K))
    z = spot / sd
    centre_sd = _centre_sd(pr, c, w, s2, F)
    return {"z": z, "center_sd_deg": centre_sd, "spot_response_hz": np.full_like(z, spot),
            "map_sd_hz": sd, "z_per_sqrt_minute": float(spot / np.sqrt(s2 * 4.0 * P / (60.0 / T * K)))}


def minutes_for_z(z_now, minutes_now, target_z):
    """Minutes for a map at ``z_now`` after ``minutes_now`` to reach ``target_z`` (z grows as the
    square root of the minutes). NaN where ``z_now`` is not positive.

    Examples
    --------
    >>> float(minutes_for_z(5.0, 10.0, 10.0))
    40.0
    """
    z_now = np.asarray(z_now, float)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(z_now > 0, np.asarray(minutes_now, float) * (np.asarray(target_z, float) / z_now) ** 2,
                        np.nan)


def flashed_presentations(rate_hz, f1_hz, target_snr, n_phases: int = 4, contrast: float = 1.0,
                          frame_rate_hz: float = 10.0, lag_shares=None, variance_factor: float = 1.0):
    """Presentations per condition (orientation x SF x phase) for ``|H| / noise = target_snr``.

    Parameters
    ----------
    rate_hz : float or array
        Mean rate during the flashed sequence.
    f1_hz : float or array
        First-harmonic amplitude over phase of the rate at the preferred grating, contrast 1, before
        the frame's temporal share: ``peak_hz / 2`` for a half-wave rectified cell (module docstring).
    target_snr : float
    n_phases, contrast, frame_rate_hz :
        The flashed protocol.
    lag_shares : array, optional
        Share of the response in each frame after a presentation (:func:`temporal_shares`); map2d pools
        the lags with the cell's own time course, so the SNR^2 of the lags add: ``|H|^2`` counts
        ``sum_l w_l^2``. Default: all of it in one frame.
    variance_factor : float
        Variance of a frame's response over ``rate_hz * frame_rate_hz`` (Poisson alone: 1). Responses
        to the neighbouring presentations add variance: 1.2-2.1 for simulated simple cells of 30-100
        spikes/s at the optimal grating (measured); ``plan_session`` measures it per cell.

    Examples
    --------
    >>> round(float(flashed_presentations(5.0, 20.0, 3.0)), 2)
    1.12
    """
    w2 = 1.0 if lag_shares is None else float(np.sum(np.square(lag_shares)))
    s2 = np.asarray(rate_hz, float) * float(frame_rate_hz) * float(variance_factor)
    h2 = (np.asarray(f1_hz, float) * float(contrast)) ** 2 * w2
    with np.errstate(invalid="ignore", divide="ignore"):
        return (4.0 / int(n_phases)) * s2 * np.asarray(target_snr, float) ** 2 / h2


def plan_session(session, target_z: float, max_lag_s: float = 0.2, target_snr: float | None = None,
                 rng=0, trace_decay="auto") -> dict:
    """Per cell and population: the minutes of sparse noise (and flashed presentations) still needed.

    Returns
    -------
    dict with ``cells`` (a table: ``cell``, ``responsive``, ``z_now``, ``minutes_now``,
    ``minutes_needed``, ``minutes_more``, and with flashed gratings ``snr_now``,
    ``presentations_now``, ``presentations_needed``) and ``population`` (dict of summary numbers).
    """
    from .contract import Traces
    from .maps import compute_maps
    ids = np.asarray(session.cell_ids)
    C = ids.size
    table = {"cell": ids.tolist()}
    pop = {"cells": int(C), "target_z": float(target_z)}
    if session.sparse_noise is not None:
        sn = session.sparse_noise
        resp = session.responses
        if isinstance(resp, Traces):
            from .traces import decay_corrected
            resp, _ = decay_corrected(resp, trace_decay, skip_s=sn.frame_interval_s,
                                      span_s=(sn.times_s[0], sn.frame_ends_s()[-1]))
        m = compute_maps(resp, sn, max_lag_s=max_lag_s, rng=rng)
        n_used = np.asarray(m.n_frames_used, float)
        minutes_now = n_used * m.frame_s / 60.0
        # the z of the map map2d fits: the linear map's peak, or for cells fitted on ON + OFF (coextensive
        # ON and OFF regions) the largest |z| of any kind
        from .maps import choose_maps
        kind = np.asarray(choose_maps(m).kind)
        z_now = np.where(m.responsive, np.where(kind == "on+off", m.max_abs_z, m.snr), np.nan)
        need = minutes_for_z(z_now, minutes_now, target_z)
        more = np.where(np.isfinite(need), np.maximum(need - minutes_now, 0.0), np.nan)
        table.update(responsive=[bool(v) for v in m.responsive], z_now=list(z_now), minutes_now=list(minutes_now),
                     minutes_needed=list(need), minutes_more=list(more))
        r = np.asarray(m.responsive, bool)
        pop.update(responsive=int(r.sum()), minutes_now=float(np.nanmedian(minutes_now)) if C else np.nan,
                   reached=int(np.sum(r & (z_now >= target_z))))
        if r.any():
            for q in (50, 90):
                pop[f"minutes_more_for_{q}pct_of_responsive"] = float(np.percentile(more[r], q))
    g = session.gratings
    if target_snr is not None and g is not None:
        from .analysis import flashed_noise
        from .gratings import analyze_flashed, flashed_rows, has_flashed
        if has_flashed(g):
            fl = analyze_flashed(session.responses, g, max_lag_s=max_lag_s, rng=rng)
            v = flashed_noise(session.responses, g, fl, max_lag_s)
            h2 = np.abs(fl.harmonic_combined) ** 2
            snr = np.full(C, np.nan)
            if v is not None:
                with np.errstate(invalid="ignore", divide="ignore"):
                    power = np.where(np.isfinite(v) & (v > 0), (h2 - v) / v, np.nan)   # |E H|^2 / noise
                    best = np.nanmax(power.reshape(C, -1), axis=1) if power.size else snr
                snr = np.sqrt(np.maximum(best, 0.0))
            n_conditions = fl.orientations_deg.size * fl.sfs_cpd.size * fl.phases_deg.size
            rows = flashed_rows(g) & (g.contrast > 0)
            per = float(np.sum(rows)) / max(n_conditions, 1)
            with np.errstate(invalid="ignore", divide="ignore"):
                needed = np.where(snr > 0, per * (target_snr / snr) ** 2, np.nan)
            table.update(snr_now=list(snr), presentations_now=[per] * C, presentations_needed=list(needed))
            pop.update(target_snr=float(target_snr), presentations_now=per,
                       snr_reached=int(np.sum(snr >= target_snr)))
    return {"cells": table, "population": pop}
