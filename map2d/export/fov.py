"""Imaging field-of-view maps: per-cell results painted into the ROI label image.

Given the label image of an imaging session (``(H, W)`` integers; label 0 is background and label
``k`` marks the pixels of cell ``k - label_offset``, so by default label ``k`` = cell ``k``),
:func:`write_fov` writes

- ``fov.tif``: an ImageJ stack, float32, one plane per property (axes ``CYX``, a label per plane naming
  the property and its unit), each ROI's pixels carrying its cell's value and NaN elsewhere (background,
  labels of no listed cell, and cells whose value is NaN). The planes have the shape and orientation
  of the label image (row 0 at the top), so they line up with the imaging frames.
- ``fov_<property>.png``: one overlay per property (matplotlib ``Figure`` rendered by Agg at 200 dpi;
  pyplot is not used) with a colour bar in the property's unit and each ROI numbered with its cell id
  (up to :data:`MAX_NUMBERED` ROIs);
  preferred orientation uses a cyclic colour map of constant lightness over 0-180 deg
  (:mod:`map2d.report.colours`, readable on the dark background at every orientation), yes/no columns
  two categorical colours; ROIs without a value are grey.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import tifffile

__all__ = ["write_fov", "read_fov", "fov_planes", "PROPERTY_INFO"]

PROPERTY_INFO: dict[str, tuple[str, str]] = {
    # column name in cells.csv: (title, unit)
    "center_x_deg": ("receptive-field azimuth", "deg"),
    "center_y_deg": ("receptive-field elevation", "deg"),
    "pref_orientation_deg": ("preferred orientation", "deg"),
    "pref_sf_cpd": ("preferred spatial frequency", "cycles/deg"),
    "agreement": ("map-grating agreement", "0-1"),
    "responsive": ("responsive to sparse noise", "yes/no"),
    "f1_f0": ("F1/F0", "ratio"),
    "peak_lag_s": ("peak lag", "s"),
    "linear": ("linear", "yes/no"),
}
"""Titles and units of the ``cells.csv`` columns; other names get their unit from the suffix."""

_SUFFIX_UNITS = {"_deg": "deg", "_cpd": "cycles/deg", "_s": "s", "_hz": "Hz"}
_NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]*$")


def _title_unit(name: str, is_bool: bool) -> tuple[str, str]:
    if name in PROPERTY_INFO:
        return PROPERTY_INFO[name]
    if is_bool:
        return name, "yes/no"
    for suffix, unit in _SUFFIX_UNITS.items():
        if name.endswith(suffix):
            return name, unit
    return name, "no unit"


def _is_orientation(name: str) -> bool:
    return "orientation" in name.lower()


def _check(labels, cell_ids, properties, label_offset):
    labels = np.asarray(labels)
    if labels.ndim != 2:
        raise ValueError(f"labels must be a 2-D label image (H, W), got shape {labels.shape}")
    if labels.size == 0:
        raise ValueError("labels is empty")
    if np.issubdtype(labels.dtype, np.bool_) or not np.issubdtype(labels.dtype, np.integer):
        if np.issubdtype(labels.dtype, np.floating) and np.all(np.isfinite(labels)) \
                and np.all(labels == np.round(labels)):
            labels = labels.astype(np.int64)
        else:
            raise ValueError(f"labels must hold integer labels, got dtype {labels.dtype}")
    if labels.min() < 0:
        raise ValueError("labels must be >= 0 (0 = background)")
    ids = np.asarray(cell_ids).reshape(-1)
    if ids.size and not (np.issubdtype(ids.dtype, np.integer)
                         or (np.issubdtype(ids.dtype, np.floating) and np.all(ids == np.round(ids)))):
        raise ValueError(f"cell_ids must be integers, got dtype {ids.dtype}")
    ids = ids.astype(np.int64)
    if np.unique(ids).size != ids.size:
        raise ValueError("cell_ids must be unique")
    if not isinstance(label_offset, (int, np.integer)) or label_offset < 0:
        raise ValueError(f"label_offset must be a non-negative integer, got {label_offset!r}")
    if ids.size and (ids + label_offset).min() < 1:
        raise ValueError(f"cell_ids + label_offset must be >= 1 (label 0 is background); cell "
                         f"{int(ids.min())} has no label with label_offset={label_offset}")
    if not isinstance(properties, dict) or not properties:
        raise ValueError("properties must be a non-empty dict {name: (C,) array}")
    props = {}
    for name, values in properties.items():
        if not isinstance(name, str) or not _NAME_RE.match(name):
            raise ValueError(f"properties: name {name!r} must be letters, digits, '_', '.' or '-'")
        arr = np.asarray(values)
        if arr.shape != ids.shape:
            raise ValueError(f"properties[{name!r}] has shape {arr.shape}, expected ({ids.size},) "
                             "like cell_ids")
        is_bool = arr.dtype == np.bool_
        try:
            props[name] = (arr.astype(np.float64), is_bool)
        except (TypeError, ValueError):
            raise ValueError(f"properties[{name!r}] must be numbers or booleans") from None
    return labels, ids, props


def fov_planes(labels, cell_ids, properties, label_offset=0) -> np.ndarray:
    """Paint each cell's property values into its ROI.

    Parameters
    ----------
    labels : array_like of int, shape (H, W)
        ROI label image; 0 = background, label ``cell_id + label_offset`` = that cell.
    cell_ids : array_like of int, shape (C,)
    properties : dict of str -> array_like, shape (C,)
        Values per cell (float or bool; NaN = not estimated).
    label_offset : int, optional
        Label of cell ``k`` is ``k + label_offset``; use 1 when cell ids start at 0 (rows of
        ``traces.npy``) and ROI labels start at 1.

    Returns
    -------
    numpy.ndarray, float32, shape (P, H, W)
        One plane per property in dict order; NaN outside the ROIs of listed cells.

    Examples
    --------
    >>> fov_planes([[0, 1], [2, 5]], [1, 2], {"a": [10.0, 20.0]})[0]
    array([[nan, 10.],
           [20., nan]], dtype=float32)
    """
    labels, ids, props = _check(labels, cell_ids, properties, label_offset)
    top = int(max(labels.max(), (ids.max() + label_offset) if ids.size else 0))
    out = np.empty((len(props),) + labels.shape, dtype=np.float32)
    for p, (values, _) in enumerate(props.values()):
        lut = np.full(top + 1, np.nan)
        lut[ids + label_offset] = values
        lut[0] = np.nan
        out[p] = lut[labels]
    return out


def write_fov(folder, labels, cell_ids, properties, *, label_offset=0, background=None) -> list[Path]:
    """Write ``fov.tif`` and one PNG overlay per property into ``folder``.

    Parameters
    ----------
    folder : str or Path
        Output folder (created if missing).
    labels : array_like of int, shape (H, W)
        ROI label image of the imaging field of view, row 0 at the top (as the imaging frames).
        0 = background; label ``k`` = cell ``k - label_offset``.
    cell_ids : array_like of int, shape (C,)
        Cell ids, in the order of the property arrays.
    properties : dict of str -> array_like, shape (C,)
        Per-cell values, e.g. ``{"center_x_deg": ..., "center_y_deg": ..., "pref_orientation_deg": ...,
        "pref_sf_cpd": ..., "agreement": ..., "responsive": ...}`` (``cells.csv`` column names get
        titles and units from :data:`PROPERTY_INFO`). Booleans become 1.0 / 0.0.
    label_offset : int, optional
        See :func:`fov_planes`. Default 0 (label ``k`` = cell ``k``).
    background : array_like, shape (H, W), optional
        An image drawn in grey under the overlays (e.g. the mean imaging frame).

    Returns
    -------
    list of Path
        ``fov.tif`` followed by the PNG files, ``fov_<name>.png``, in property order.

    Raises
    ------
    ValueError
        When an argument is malformed or its shape does not match (the message names it).
    """
    labels_arr, ids, props = _check(labels, cell_ids, properties, label_offset)
    if background is not None:
        background = np.asarray(background, dtype=float)
        if background.shape != labels_arr.shape:
            raise ValueError(f"background has shape {background.shape}, expected {labels_arr.shape} "
                             "like labels")
    planes = fov_planes(labels_arr, ids, {k: v[0] for k, v in props.items()}, label_offset)
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)

    names = list(props)
    titles = {n: _title_unit(n, props[n][1]) for n in names}
    tif_path = folder / "fov.tif"
    info = "\n".join(
        [f"plane {p}: {n} ({titles[n][0]}, {titles[n][1]})" for p, n in enumerate(names)]
        + [f"label 0 = background; label k = cell k - {label_offset}; NaN = no cell or no value"])
    tifffile.imwrite(tif_path, planes, imagej=True, photometric="minisblack",
                     metadata={"axes": "CYX", "unit": "pixel",
                               "Labels": [f"{n} [{titles[n][1]}]" for n in names],
                               "Info": info})
    paths = [tif_path]
    for p, name in enumerate(names):
        path = folder / f"fov_{name}.png"
        _overlay_png(path, planes[p], labels_arr, name, *titles[name], is_bool=props[name][1],
                     background=background, label_offset=label_offset)
        paths.append(path)
    return paths


def read_fov(path) -> dict:
    """Read a ``fov.tif``: ``{"planes": (P, H, W) float32, "labels": [...], "info": str}``."""
    with tifffile.TiffFile(Path(path)) as tif:
        ij = tif.imagej_metadata or {}
        page = tif.pages.first
        h, w = page.shape[-2:]
        arr = tif.asarray().reshape(-1, h, w)
    labels = ij.get("Labels")
    if isinstance(labels, str):
        labels = [labels]
    return {"planes": arr, "labels": labels, "info": ij.get("Info")}


#: Colours of the yes / no maps (categorical, the report's; NaN ROIs are grey, background dark).
YES_NO_COLOURS = ("#7d8b99", "#d9822b")
_BACKGROUND = "#26282c"
#: Most ROIs numbered in a PNG.
MAX_NUMBERED = 120
_NO_VALUE = "#787a80"


def _is_yes_no(name, plane, is_bool):
    """Booleans, or a yes/no column (:data:`PROPERTY_INFO`) passed as 0.0 / 1.0 / NaN."""
    if is_bool:
        return True
    if PROPERTY_INFO.get(name, ("", ""))[1] != "yes/no":
        return False
    v = plane[np.isfinite(plane)]
    return bool(np.all((v == 0) | (v == 1)))


def _overlay_png(path, plane, labels, name, title, unit, *, is_bool, background, label_offset=0):
    import matplotlib
    from matplotlib import colors
    from matplotlib.figure import Figure
    from skimage.segmentation import find_boundaries

    from ..report.colours import cyclic_colormap

    h, w = plane.shape
    width = 6.4
    fig = Figure(figsize=(width, max(2.8, width * h / w * 0.82)), dpi=100)
    ax = fig.add_subplot(1, 1, 1)
    ax.set_facecolor(_BACKGROUND)
    if background is not None:
        lo, hi = np.nanpercentile(background, [1, 99]) if np.isfinite(background).any() else (0, 1)
        ax.imshow(background, cmap="gray", vmin=lo, vmax=hi if hi > lo else lo + 1,
                  interpolation="nearest", alpha=0.55)
    else:
        ax.imshow(np.zeros((h, w)), cmap=colors.ListedColormap([_BACKGROUND]), interpolation="nearest")
    in_roi = labels > 0
    ax.imshow(np.ma.masked_where(~(in_roi & ~np.isfinite(plane)), np.ones((h, w))),
              cmap=colors.ListedColormap([_NO_VALUE]), interpolation="nearest")
    data = np.ma.masked_invalid(plane)
    yes_no = _is_yes_no(name, plane, is_bool)
    if _is_orientation(name):
        cmap, norm = cyclic_colormap(), colors.Normalize(0.0, 180.0)
    elif yes_no:
        cmap = colors.ListedColormap(list(YES_NO_COLOURS))
        norm = colors.BoundaryNorm([-0.5, 0.5, 1.5], 2)
    else:
        finite = plane[np.isfinite(plane)]
        lo, hi = (float(finite.min()), float(finite.max())) if finite.size else (0.0, 1.0)
        if name == "agreement":
            lo, hi = 0.0, 1.0
        if hi <= lo:
            lo, hi = lo - 0.5, hi + 0.5
        cmap, norm = matplotlib.colormaps["viridis"], colors.Normalize(lo, hi)
    im = ax.imshow(data, cmap=cmap, norm=norm, interpolation="nearest")
    edges = find_boundaries(labels, mode="outer") & (labels == 0)   # ring just outside each ROI
    if edges.any():
        ax.imshow(np.ma.masked_where(~edges, np.ones((h, w))), cmap=colors.ListedColormap(["#d0d0d0"]),
                  alpha=0.5, interpolation="nearest")
    # ROI numbers (cell ids) at the ROI centroids, white on a dark outline; up to MAX_NUMBERED ROIs
    # (text is most of a PNG's drawing time; report.html numbers every ROI)
    ids = np.unique(labels[labels > 0])
    if 0 < ids.size <= MAX_NUMBERED:
        import matplotlib.patheffects as pe
        from scipy import ndimage
        cen = ndimage.center_of_mass(np.ones_like(labels), labels, ids)
        size = 7 if ids.size <= 60 else 5.5
        for lab, (cy, cx) in zip(ids, cen):
            ax.text(cx, cy, str(int(lab) - int(label_offset)), ha="center", va="center", fontsize=size,
                    color="white", path_effects=[pe.withStroke(linewidth=1.6, foreground="black")])
    cb = fig.colorbar(im, ax=ax, fraction=0.046, pad=0.04)
    cb.ax.tick_params(labelsize=9)
    if yes_no:
        cb.set_ticks([0, 1])
        cb.set_ticklabels(["no", "yes"])
        cb.set_label(f"{title} (grey ROI: no value)", fontsize=10)
    else:
        cb.set_label(f"{title} ({unit}; grey ROI: no value)", fontsize=10)
        if _is_orientation(name):
            cb.set_ticks([0, 45, 90, 135, 180])
    numbered = 0 < ids.size <= MAX_NUMBERED
    ax.set_title(f"{title}, field of view" + (" (numbers: cell ids)" if numbered else ""), fontsize=11)
    ax.set_xlabel("imaging x (pixels)", fontsize=10)
    ax.set_ylabel("imaging y (pixels, row 0 at top)", fontsize=10)
    ax.tick_params(labelsize=9)
    fig.subplots_adjust(left=0.11, right=0.93, bottom=0.12, top=0.92)   # fixed: no layout pass (a whole draw)
    fig.savefig(path, dpi=200)
