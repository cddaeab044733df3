"""Spatial receptive-field models, shared by the simulator and the fits.

All take positions in degrees (any matching shapes) and return the model's weight there.
Angles follow the contract: ``theta_deg`` is counter-clockwise from +x (azimuth) and, for the Gabor,
is the wave-vector angle of the carrier (0 deg = vertical stripes).

References
----------
Enroth-Cugell C, Robson JG (1966) The contrast sensitivity of retinal ganglion cells of the cat.
J Physiol 187:517-552 (difference of Gaussians).
Jones JP, Palmer LA (1987) An evaluation of the two-dimensional Gabor filter model of simple
receptive fields in cat striate cortex. J Neurophysiol 58:1233-1258 (Gabor).
"""

from __future__ import annotations

import numpy as np

__all__ = ["gaussian2d", "dog2d", "gabor2d", "dog_spectrum", "dog_peak_sf"]


def _rotated(x, y, x0, y0, theta_deg):
    th = np.deg2rad(theta_deg)
    dx = np.asarray(x, float) - x0
    dy = np.asarray(y, float) - y0
    u = dx * np.cos(th) + dy * np.sin(th)      # along theta
    v = -dx * np.sin(th) + dy * np.cos(th)     # across theta
    return u, v


def gaussian2d(x, y, x0, y0, sigma_u_deg, sigma_v_deg, theta_deg=0.0, amplitude=1.0):
    """Elliptical Gaussian ``A exp(-u^2 / 2 su^2 - v^2 / 2 sv^2)``, ``u`` along ``theta``.

    Examples
    --------
    >>> float(gaussian2d(1.0, 0.0, 0.0, 0.0, 1.0, 2.0))
    0.6065306597126334
    """
    u, v = _rotated(x, y, x0, y0, theta_deg)
    return amplitude * np.exp(-0.5 * (u / sigma_u_deg) ** 2 - 0.5 * (v / sigma_v_deg) ** 2)


def dog2d(x, y, x0, y0, kc, rc_deg, ks, rs_deg):
    """Difference of Gaussians ``kc exp(-r^2 / rc^2) - ks exp(-r^2 / rs^2)``.

    The Enroth-Cugell & Robson (1966) form: ``kc``, ``ks`` are the peak sensitivities of centre
    and surround, ``rc``, ``rs`` their radii (where each falls to 1/e). An OFF-centre cell has
    negative ``kc`` and ``ks``.
    """
    r2 = (np.asarray(x, float) - x0) ** 2 + (np.asarray(y, float) - y0) ** 2
    return kc * np.exp(-r2 / rc_deg**2) - ks * np.exp(-r2 / rs_deg**2)


def dog_spectrum(sf_cpd, kc, rc_deg, ks, rs_deg):
    """Fourier transform of :func:`dog2d` at radial frequency ``sf_cpd`` (centred at the origin).

    ``kc pi rc^2 exp(-(pi rc f)^2) - ks pi rs^2 exp(-(pi rs f)^2)`` (Gaussian transform pair,
    Bracewell, The Fourier Transform and Its Applications).
    """
    f = np.asarray(sf_cpd, float)
    return (kc * np.pi * rc_deg**2 * np.exp(-(np.pi * rc_deg * f) ** 2)
            - ks * np.pi * rs_deg**2 * np.exp(-(np.pi * rs_deg * f) ** 2))


def dog_peak_sf(kc, rc_deg, ks, rs_deg):
    """Spatial frequency at which :func:`dog_spectrum` peaks (0 when it peaks at DC).

    With integrated strengths ``Kc = kc pi rc^2`` and ``Ks = ks pi rs^2`` the peak is at
    ``sqrt(ln(Kc rc^2 / (Ks rs^2)) / (pi^2 (rc^2 - rs^2)))`` (set the derivative of the spectrum to 0).
    """
    big_kc = kc * np.pi * rc_deg**2
    big_ks = ks * np.pi * rs_deg**2
    ratio = (big_kc * rc_deg**2) / (big_ks * rs_deg**2)
    if ratio <= 0 or rc_deg == rs_deg:
        return 0.0
    f2 = np.log(ratio) / (np.pi**2 * (rc_deg**2 - rs_deg**2))
    return float(np.sqrt(f2)) if f2 > 0 else 0.0


def gabor2d(x, y, x0, y0, sigma_u_deg, sigma_v_deg, theta_deg, sf_cpd, phase_deg, amplitude=1.0):
    """Gabor: Gaussian envelope times ``cos(2 pi sf u + phase)``.

    ``u`` is the distance from the envelope centre along the wave vector ``theta_deg``
    (contract convention, 0 deg = vertical stripes), ``sigma_u`` the envelope width along it and
    ``sigma_v`` across it. At ``phase = 0`` the Gabor is even (ON-centre); at 90 deg it is odd.
    Jones & Palmer (1987).
    """
    u, v = _rotated(x, y, x0, y0, theta_deg)
    env = np.exp(-0.5 * (u / sigma_u_deg) ** 2 - 0.5 * (v / sigma_v_deg) ** 2)
    return amplitude * env * np.cos(2 * np.pi * sf_cpd * u + np.deg2rad(phase_deg))
