"""Colour maps of the report and the field-of-view images.

- signed values (maps, phase-averaged surfaces): a diverging map centred on 0 (matplotlib ``PuOr_r``:
  orange = more response, purple = less);
- magnitudes: matplotlib ``viridis``;
- orientation (cyclic over 0-180 deg): our own map, a circle of hue at constant lightness and chroma in
  CIE L*a*b* (L* = 66, C* = 42), so that every orientation is equally visible on a dark or a light
  background and no orientation reads as "more" than another (a map that passes through black or
  white would hide ROIs at those orientations against the background).

CIE L*a*b* -> sRGB uses the D65 white point and the sRGB transfer function (IEC 61966-2-1; formulas as
in Wyszecki & Stiles, Color Science, 2nd ed.).
"""

from __future__ import annotations

import numpy as np

__all__ = ["cyclic_rgb", "lut_hex", "cyclic_colormap", "report_luts"]

_WHITE_D65 = np.array([0.95047, 1.0, 1.08883])
_XYZ_TO_RGB = np.array([[3.2404542, -1.5371385, -0.4985314],
                        [-0.9692660, 1.8760108, 0.0415560],
                        [0.0556434, -0.2040259, 1.0572252]])


def _lab_to_srgb(lab):
    lab = np.asarray(lab, float)
    L, a, b = lab[..., 0], lab[..., 1], lab[..., 2]
    fy = (L + 16.0) / 116.0
    fx, fz = fy + a / 500.0, fy - b / 200.0
    eps = 6.0 / 29.0

    def finv(t):
        return np.where(t > eps, t ** 3, 3 * eps ** 2 * (t - 4.0 / 29.0))
    xyz = np.stack([finv(fx), finv(fy), finv(fz)], axis=-1) * _WHITE_D65
    rgb = xyz @ _XYZ_TO_RGB.T
    rgb = np.clip(rgb, 0.0, 1.0)
    return np.where(rgb <= 0.0031308, 12.92 * rgb, 1.055 * rgb ** (1 / 2.4) - 0.055)


def cyclic_rgb(n=256, lightness=66.0, chroma=42.0, start_deg=20.0):
    """``n`` sRGB colours (rows in 0-1) around a hue circle at constant L* and C* (module notes).

    Examples
    --------
    >>> c = cyclic_rgb(8)
    >>> c.shape, bool(np.all((c >= 0) & (c <= 1)))
    ((8, 3), True)
    """
    h = np.deg2rad(start_deg + 360.0 * np.arange(n) / n)
    lab = np.stack([np.full(n, lightness), chroma * np.cos(h), chroma * np.sin(h)], axis=-1)
    return _lab_to_srgb(lab)


def cyclic_colormap():
    """The orientation map as a matplotlib ``ListedColormap`` (for 0-180 deg)."""
    from matplotlib.colors import ListedColormap
    return ListedColormap(cyclic_rgb(256), name="map2d_orientation")


#: 64 colours of matplotlib's ``PuOr_r`` (hex, 6 digits each), so that the page needs no matplotlib.
_SIGNED_HEX = (
    "2d004b330655390c5e3f12684518714c1f7b522584582e8c5f3a916646976d529c745ea27b6aa88275ad8a7eb39287b9"
    "9b92c1a39bc7aba3cdb3acd2b9b3d6bfbbdac5c2decbc9e2d1d1e6d7d8eadcddece1e2eee5e7f0eaebf2eff0f4f4f4f6"
    "f8f5f1f9f1e6faeedcfbead2fce6c8fde3befedeb3fed8a6fed299fdcc8cfdc57ffdbf72fdb965f9b158f4a84cf0a03f"
    "ea9530e68d23e18417db7d12d47610cd700ec6690cbe630ab75c07b05606a85206a04d079749078f44078740087f3b08"
)
#: 64 colours of matplotlib's ``viridis`` (hex, 6 digits each), so that the page needs no matplotlib.
_MAGNITUDE_HEX = (
    "44015446075a470d6047136548186a481d6f482374482878472d7b46327e453781443b844240864045883e49893d4e8a"
    "3a538b38588c365c8d34608d32648e31688e2f6c8e2d708e2c738e2a778e297b8e277f8e26828e24868e238a8d218e8d"
    "20928c1f968b1f9a8a1f9e891fa18721a58523a98326ad812ab07f2fb47c35b7793bbb7542be714ac16d52c5695ac864"
    "65cb5e6ece5877d15381d34d8bd64695d840a0da39aadc32b5de2bc0df25cae11fd5e21adfe318eae51af4e61efde725"
)


def _split(hexes):
    return ["#" + hexes[i:i + 6] for i in range(0, len(hexes), 6)]


def _hex(rgb):
    return ["#%02x%02x%02x" % tuple(int(round(255 * v)) for v in row[:3]) for row in rgb]


def lut_hex(name, n=64):
    """``n`` colours of a matplotlib colour map (or ``"cyclic"``) as ``#rrggbb`` strings."""
    if name == "cyclic":
        return _hex(cyclic_rgb(n))
    import matplotlib
    return _hex(matplotlib.colormaps[name](np.linspace(0.0, 1.0, n)))


def report_luts():
    """The three look-up tables the page uses: signed, magnitude and cyclic (64 colours each)."""
    return {"signed": _split(_SIGNED_HEX), "magnitude": _split(_MAGNITUDE_HEX), "cyclic": lut_hex("cyclic")}
