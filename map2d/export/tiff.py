"""Receptive-field map stacks as ImageJ hyperstacks and OME-TIFF files.

Both writers take the same plain arrays: ``maps`` of shape ``(L, C, K, ny, nx)`` (lag, cell, map kind,
grid rows, grid columns), the sparse-noise :class:`~map2d.geometry.Grid`, the lags in seconds, the cell
ids (order of ``cells.csv``) and the names of the map kinds.

Calibration of ``maps.tif`` (ImageJ)
------------------------------------
ImageJ calibrates a pixel coordinate ``p`` as ``(p - origin) * pixel_size`` (origin in pixels,
pixel size = 1 / resolution). With ``dx, dy`` the grid spacing and ``x_deg, y_deg`` the pixel-centre
positions of :class:`~map2d.geometry.Grid` we write

- resolution ``1 / dx`` and ``1 / dy`` pixels per degree, unit ``deg``;
- ``xorigin = -x_deg[0] / dx``, so the calibrated x of column ``j`` is
  ``(j - xorigin) * dx = x_deg[j]``: the azimuth of that column's centre;
- ``yorigin = y_deg[0] / dy``, so the plain calibrated y of row ``i`` is
  ``(i - yorigin) * dy = -y_deg[i]``: minus the elevation of that row's centre (ImageJ's y grows
  downward, elevation grows upward). The file also carries ImageJ's ``inverty=true`` flag
  ("Invert Y coordinates" in ImageJ's image properties); a reader that honours it reports
  ``(yorigin - i) * dy = y_deg[i]``, the elevation itself. The flag is left out when ``yorigin`` is
  exactly 0, where ImageJ would fall back to counting from the bottom row (behaviour of ImageJ's
  calibration quoted from memory).

Integer pixel indices are pixel centres here, as in numpy. In ImageJ's continuous coordinates, where
pixel ``j`` covers ``[j, j + 1)`` and its centroid is ``j + 0.5``, the azimuth of a continuous
coordinate ``c`` is ``(c - 0.5 - xorigin) * dx``.

OME-TIFF
--------
The OME data model's length units have no angle, so ``maps.ome.tif`` gives its physical pixel size
in the OME unit ``reference frame`` (an arbitrary unit of the image's own reference frame) with
``PhysicalSizeX = dx``, ``PhysicalSizeY = dy``, and a ``MapAnnotation`` (namespace
:data:`OME_NAMESPACE`) that states that one reference-frame unit is one degree of visual angle and gives
degrees per pixel, the grid centre, the pixel-centre formulas, what each axis means, the lags, the
map kinds and the cell ids.
"""

from __future__ import annotations

import json
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import tifffile

from map2d.geometry import Grid

__all__ = [
    "write_maps_tiff",
    "write_maps_ome_tiff",
    "read_maps_tiff",
    "read_maps_ome_tiff",
    "plane_labels",
    "OME_NAMESPACE",
]

OME_NAMESPACE = "map2d/receptive-field-maps/1"
"""Namespace of the MapAnnotation that ``maps.ome.tif`` carries."""

_AXES = "TZCYX"
_AXIS_MEANING = {
    "T": "lag: time from stimulus-frame onset to response, seconds (values in lags_s)",
    "Z": "cell, in the order of cells.csv (ids in cell_ids)",
    "C": "map kind (names in kinds)",
    "Y": "sparse-noise grid row; row 0 is the top (highest elevation)",
    "X": "sparse-noise grid column; column 0 is the left (lowest azimuth)",
}


def _check(maps, grid, lags_s, cell_ids, kinds, unit_label):
    """Validate the common arguments; return float32 maps and plain lists."""
    if not isinstance(grid, Grid):
        raise ValueError(f"grid must be a map2d.geometry.Grid, got {type(grid).__name__}")
    maps = np.asarray(maps)
    if maps.ndim != 5:
        raise ValueError(f"maps must have 5 axes (lag, cell, kind, ny, nx), got shape {maps.shape}")
    if not (np.issubdtype(maps.dtype, np.floating) or np.issubdtype(maps.dtype, np.integer)):
        raise ValueError(f"maps must be numeric, got dtype {maps.dtype}")
    n_lag, n_cell, n_kind, ny, nx = maps.shape
    if (ny, nx) != grid.shape:
        raise ValueError(f"maps grid axes {(ny, nx)} do not match grid shape {grid.shape}")
    lags = np.asarray(lags_s, dtype=float).reshape(-1)
    if lags.size != n_lag:
        raise ValueError(f"lags_s has {lags.size} values but maps has {n_lag} lags")
    if not np.all(np.isfinite(lags)):
        raise ValueError("lags_s must be finite")
    ids = np.asarray(cell_ids).reshape(-1)
    if ids.size != n_cell:
        raise ValueError(f"cell_ids has {ids.size} values but maps has {n_cell} cells")
    if ids.size and not (np.issubdtype(ids.dtype, np.integer)
                         or (np.issubdtype(ids.dtype, np.floating) and np.all(ids == np.round(ids)))):
        raise ValueError(f"cell_ids must be integers, got {ids.dtype}")
    ids = [int(i) for i in ids]
    if len(set(ids)) != len(ids):
        raise ValueError("cell_ids must be unique")
    kinds = [str(k) for k in kinds]
    if len(kinds) != n_kind:
        raise ValueError(f"kinds has {len(kinds)} names but maps has {n_kind} map kinds")
    if len(set(kinds)) != len(kinds) or any(not k for k in kinds):
        raise ValueError(f"kinds must be distinct non-empty names, got {kinds}")
    if not isinstance(unit_label, str):
        raise ValueError(f"unit_label must be a string, got {type(unit_label).__name__}")
    return np.ascontiguousarray(maps, dtype=np.float32), [float(v) for v in lags], ids, kinds


def _origin(grid: Grid) -> tuple[float, float]:
    """ImageJ ``(xorigin, yorigin)`` in pixels (see the module docstring)."""
    return (-float(grid.x_deg[0]) / grid.dx_deg, float(grid.y_deg[0]) / grid.dy_deg)


def _fmt_lag(lag_s: float) -> str:
    return f"{lag_s * 1000.0:.6g} ms"


def plane_labels(lags_s, cell_ids, kinds) -> list[str]:
    """One label per plane in ImageJ's order (T slowest, then Z, then C).

    Examples
    --------
    >>> plane_labels([0.05], [3, 7], ["ON", "OFF"])
    ['cell 3, lag 50 ms, ON', 'cell 3, lag 50 ms, OFF', 'cell 7, lag 50 ms, ON', 'cell 7, lag 50 ms, OFF']
    """
    return [f"cell {int(c)}, lag {_fmt_lag(float(t))}, {k}"
            for t in lags_s for c in cell_ids for k in kinds]


def _description_pairs(grid: Grid, lags, ids, kinds, unit_label) -> dict[str, str]:
    """Key/value pairs shared by both formats (strings; lists as JSON)."""
    x0, y0 = float(grid.x_deg[0]), float(grid.y_deg[0])
    pairs = {
        "space_unit": "deg (degrees of visual angle)",
        "x_axis": "azimuth, deg, positive to the right",
        "y_axis": "elevation, deg, positive up; row 0 is the top",
        "degrees_per_pixel_x": repr(float(grid.dx_deg)),
        "degrees_per_pixel_y": repr(float(grid.dy_deg)),
        "grid_center_x_deg": repr(float(grid.center_x_deg)),
        "grid_center_y_deg": repr(float(grid.center_y_deg)),
        "grid_shape_ny_nx": json.dumps(list(grid.shape)),
        "x_of_column_0_deg": repr(x0),
        "y_of_row_0_deg": repr(y0),
        "pixel_center_formula": ("x = x0 + (j - (nx - 1) / 2) * dx; y = y0 - (i - (ny - 1) / 2) * dy; "
                                 "(i, j) = (row, column), (x0, y0) = grid centre"),
        "axes": _AXES,
        "lags_s": json.dumps(lags),
        "cell_ids": json.dumps(ids),
        "kinds": json.dumps(kinds),
        "value_unit": unit_label,
    }
    for ax in _AXES:
        pairs[f"axis_{ax}"] = _AXIS_MEANING[ax]
    return pairs


def write_maps_tiff(path, maps, grid, lags_s, cell_ids, kinds=("ON", "OFF", "linear"),
                    unit_label="spikes/s") -> None:
    """Write receptive-field maps as an ImageJ hyperstack (``maps.tif``).

    Parameters
    ----------
    path : str or Path
        Output file.
    maps : array_like, shape (L, C, K, ny, nx)
        Axes ``TZCYX``: T = lag, Z = cell (order of ``cells.csv``), C = map kind, Y/X = the
        sparse-noise grid with row 0 at the top (the contract's layout; no flip is applied).
        Stored as float32; NaN is kept.
    grid : map2d.geometry.Grid
        The sparse-noise grid; its shape must be ``(ny, nx)``.
    lags_s : array_like, shape (L,)
        Lag of each T plane, seconds.
    cell_ids : array_like of int, shape (C,)
        Cell id of each Z plane.
    kinds : sequence of str, length K
        Name of each C plane, by default ``("ON", "OFF", "linear")``.
    unit_label : str
        Unit of the map values (written to the ``Info`` text and properties; ImageJ has no value unit
        for 32-bit images).

    Notes
    -----
    Spatial calibration (unit ``deg``): calibrated x of column ``j`` = ``(j - xorigin) * dx`` =
    azimuth of the column centre; plain calibrated y of row ``i`` = ``(i - yorigin) * dy`` = minus the
    elevation of the row centre, and ``(yorigin - i) * dy`` = the elevation where ImageJ's
    ``inverty`` flag (written when ``yorigin != 0``) is honoured. See the module docstring.
    Each plane has a label ``"cell <id>, lag <ms> ms, <kind>"``; the ``Info`` text and the ImageJ
    ``Properties`` carry the grid, the lags, the cell ids and the kinds.

    Raises
    ------
    ValueError
        When an argument's shape or length does not match ``maps`` (the message names it).
    """
    data, lags, ids, kinds = _check(maps, grid, lags_s, cell_ids, kinds, unit_label)
    xorigin, yorigin = _origin(grid)
    pairs = _description_pairs(grid, lags, ids, kinds, unit_label)
    info = "\n".join(f"{k} = {v}" for k, v in pairs.items())
    info += ("\ncalibration = calibrated x = (column - xorigin) * dx = azimuth of the column centre; "
             "calibrated y = (row - yorigin) * dy = -elevation of the row centre "
             "(= +elevation when ImageJ inverts y)")
    metadata = {
        "axes": _AXES,
        "unit": "deg",
        "xorigin": xorigin,
        "yorigin": yorigin,
        "Labels": plane_labels(lags, ids, kinds),
        "Info": info,
        "Properties": {f"map2d.{k}": v for k, v in pairs.items()},
    }
    if yorigin != 0.0:
        metadata["inverty"] = True
    if len(lags) > 1:
        steps = np.diff(lags)
        if np.all(steps > 0) and np.allclose(steps, steps[0], rtol=1e-9, atol=0):
            metadata["finterval"] = float(steps[0])
    tifffile.imwrite(Path(path), data, imagej=True, photometric="minisblack",
                     resolution=(1.0 / grid.dx_deg, 1.0 / grid.dy_deg), metadata=metadata)


def write_maps_ome_tiff(path, maps, grid, lags_s, cell_ids, kinds=("ON", "OFF", "linear"),
                        unit_label="spikes/s") -> None:
    """Write receptive-field maps as OME-TIFF (``maps.ome.tif``).

    Same arguments and layout as :func:`write_maps_tiff` (axes ``TZCYX``, row 0 at the top).

    The OME data model has no angular length unit, so ``PhysicalSizeX/Y`` are ``dx`` and ``dy`` in
    the OME unit ``reference frame`` (an arbitrary unit of the image's own frame), which the
    ``MapAnnotation`` (namespace :data:`OME_NAMESPACE`) defines as one degree of visual angle. The
    annotation also gives degrees per pixel, the grid centre, the positions of column 0 and row 0,
    the pixel-centre formulas, the meaning of each axis, the lags, the cell ids, the map kinds and
    the value unit. Channels are named after the map kinds. When the lags are evenly spaced the
    ``TimeIncrement`` is their step in seconds.

    Raises
    ------
    ValueError
        When an argument's shape or length does not match ``maps`` (the message names it).
    """
    data, lags, ids, kinds = _check(maps, grid, lags_s, cell_ids, kinds, unit_label)
    pairs = {"length_unit": "1 OME 'reference frame' unit = 1 degree of visual angle"}
    pairs.update(_description_pairs(grid, lags, ids, kinds, unit_label))
    metadata = {
        "axes": _AXES,
        "Name": "receptive-field maps",
        "PhysicalSizeX": float(grid.dx_deg),
        "PhysicalSizeXUnit": "reference frame",
        "PhysicalSizeY": float(grid.dy_deg),
        "PhysicalSizeYUnit": "reference frame",
        "Channel": {"Name": kinds},
        "MapAnnotation": {
            "Namespace": OME_NAMESPACE,
            "Description": "Receptive-field maps on a sparse-noise grid in degrees of visual angle",
            "Value": pairs,
        },
    }
    if len(lags) > 1:
        steps = np.diff(lags)
        if np.all(steps > 0) and np.allclose(steps, steps[0], rtol=1e-9, atol=0):
            metadata["TimeIncrement"] = float(steps[0])
            metadata["TimeIncrementUnit"] = "s"
    metadata["UUID"] = _content_uuid(data, metadata)     # same maps, same file (no random UUID)
    tifffile.imwrite(Path(path), data, ome=True, photometric="minisblack",
                     bigtiff=data.nbytes > 2**31, metadata=metadata)


def _content_uuid(data, metadata) -> str:
    """A UUID derived from the pixels and the metadata (name-based, RFC 4122 version 5), so that
    rerunning an analysis writes a byte-identical OME-TIFF.

    >>> a = np.zeros((1, 2), np.float32)
    >>> _content_uuid(a, {"x": 1}) == _content_uuid(a.copy(), {"x": 1}) != _content_uuid(a + 1, {"x": 1})
    True
    """
    import hashlib
    import json
    import uuid
    h = hashlib.sha256(np.ascontiguousarray(data).tobytes())
    h.update(json.dumps(metadata, sort_keys=True, default=str).encode("utf-8"))
    return f"urn:uuid:{uuid.uuid5(uuid.NAMESPACE_URL, 'map2d:maps.ome.tif:' + h.hexdigest())}"


def read_maps_tiff(path) -> dict:
    """Read a ``maps.tif`` written by :func:`write_maps_tiff`.

    Returns
    -------
    dict
        ``array`` float32 ``(L, C, K, ny, nx)``; ``axes`` (``"TZCYX"``); ``labels`` (one per plane);
        ``unit`` (the spatial unit, ``"deg"``); ``resolution`` ``(x, y)`` pixels per unit;
        ``origin`` ``(xorigin, yorigin)`` in pixels; ``inverty`` (bool); ``x_deg`` ``(nx,)`` and
        ``y_deg`` ``(ny,)``: azimuth and elevation of the column and row centres computed from the
        calibration alone (``x = (j - xorigin) / xres``, ``y = -(i - yorigin) / yres``);
        ``lags_s``, ``cell_ids``, ``kinds``, ``value_unit`` from the stored properties (None when
        absent), and ``info`` (the Info text).
    """
    with tifffile.TiffFile(Path(path)) as tif:
        ij = tif.imagej_metadata
        if ij is None:
            raise ValueError(f"{path} is not an ImageJ TIFF")
        page = tif.pages.first
        xres = _rational(page.tags["XResolution"].value)
        yres = _rational(page.tags["YResolution"].value)
        ny, nx = page.shape[-2:]
        arr = tif.asarray()
    n_t = int(ij.get("frames", 1))
    n_z = int(ij.get("slices", 1))
    n_c = int(ij.get("channels", 1))
    arr = np.asarray(arr).reshape(n_t, n_z, n_c, ny, nx)
    xorigin = float(ij.get("xorigin", 0.0))
    yorigin = float(ij.get("yorigin", 0.0))
    props = ij.get("Properties", {}) or {}

    def prop(key):
        v = props.get(f"map2d.{key}")
        return None if v is None else json.loads(v)

    labels = ij.get("Labels")
    if isinstance(labels, str):
        labels = [labels]
    return {
        "array": arr,
        "axes": _AXES,
        "labels": list(labels) if labels is not None else None,
        "unit": ij.get("unit"),
        "resolution": (xres, yres),
        "origin": (xorigin, yorigin),
        "inverty": bool(ij.get("inverty", False)),
        "x_deg": (np.arange(nx) - xorigin) / xres,
        "y_deg": -(np.arange(ny) - yorigin) / yres,
        "lags_s": prop("lags_s"),
        "cell_ids": prop("cell_ids"),
        "kinds": prop("kinds"),
        "value_unit": props.get("map2d.value_unit"),
        "info": ij.get("Info"),
    }


def _rational(value) -> float:
    if isinstance(value, tuple):
        return value[0] / value[1]
    return float(value)


def read_maps_ome_tiff(path) -> dict:
    """Read a ``maps.ome.tif`` written by :func:`write_maps_ome_tiff`.

    Returns
    -------
    dict
        ``array`` float32 ``(L, C, K, ny, nx)``; ``axes``; ``physical_size`` ``(x, y)`` and
        ``physical_size_unit`` ``(x, y)`` from the OME ``Pixels`` element; ``channel_names``;
        ``annotation``: the key/value pairs of the map2d ``MapAnnotation`` (strings as stored), and
        parsed from it ``lags_s``, ``cell_ids``, ``kinds``, ``degrees_per_pixel`` ``(dx, dy)``,
        ``grid_center_deg`` ``(x0, y0)``.
    """
    with tifffile.TiffFile(Path(path)) as tif:
        xml = tif.ome_metadata
        if xml is None:
            raise ValueError(f"{path} is not an OME-TIFF")
        series = tif.series[0]
        axes = series.get_axes(False)
        arr = series.asarray(squeeze=False)
    # tifffile may add a trailing sample axis 'S' of length 1 when not squeezing
    keep = [i for i, a in enumerate(axes) if a in _AXES]
    drop = tuple(i for i, a in enumerate(axes) if a not in _AXES)
    if drop and all(arr.shape[i] == 1 for i in drop):
        arr = arr.reshape([arr.shape[i] for i in keep])
        axes = "".join(axes[i] for i in keep)
    if axes != _AXES:
        perm = [axes.index(a) for a in _AXES]
        arr = np.transpose(arr, perm)
        axes = _AXES
    root = ET.fromstring(xml)
    ns = {"ome": root.tag.split("}")[0].strip("{")}
    pixels = root.find("ome:Image/ome:Pixels", ns)
    if pixels is None:
        raise ValueError(f"{path}: OME metadata has no Pixels element")
    channel_names = [c.get("Name") for c in pixels.findall("ome:Channel", ns)]
    pairs = None
    for ann in root.iter(f"{{{ns['ome']}}}MapAnnotation"):
        if ann.get("Namespace") == OME_NAMESPACE:
            pairs = {m.get("K"): m.text or "" for m in ann.iter(f"{{{ns['ome']}}}M")}
            break
    out = {
        "array": arr,
        "axes": axes,
        "physical_size": (float(pixels.get("PhysicalSizeX", "nan")),
                          float(pixels.get("PhysicalSizeY", "nan"))),
        "physical_size_unit": (pixels.get("PhysicalSizeXUnit"), pixels.get("PhysicalSizeYUnit")),
        "channel_names": channel_names,
        "annotation": pairs,
    }
    if pairs is not None:
        out.update(
            lags_s=json.loads(pairs["lags_s"]),
            cell_ids=json.loads(pairs["cell_ids"]),
            kinds=json.loads(pairs["kinds"]),
            degrees_per_pixel=(float(pairs["degrees_per_pixel_x"]), float(pairs["degrees_per_pixel_y"])),
            grid_center_deg=(float(pairs["grid_center_x_deg"]), float(pairs["grid_center_y_deg"])),
        )
    return out
