"""NWB input: a :class:`map2d.contract.Session` from a Neurodata Without Borders file, and back.

Reading needs the optional package ``pynwb`` (``pip install 'map2d[nwb]'``); everything else in map2d
works without it.

An NWB file does not say which of its tables is the grating sequence, how its columns are named or
where the sparse-noise grid sits in visual space, so a small JSON *mapping* says it::

    {
      "name": "mouse12_day3",                                   (optional)
      "responses": {"kind": "spikes", "units": "units"},         ("units" optional, default "units")
      "gratings": {
        "table": "gratings",                                     (a TimeIntervals table)
        "columns": {"orientation_deg": "orientation", "sf_cpd": "spatial_frequency",
                    "phase_deg": {"column": "phase", "scale": 360}, "contrast": "contrast",
                    "tf_hz": 0},
        "phase_origin_deg": [10, 5]                              (optional, default the grid centre)
      },
      "sparse_noise": {
        "series": "sparse_noise",                                (a series in the file, or:)
        "frames": "sparse_noise.npy", "times": "sparse_noise_times.npy",   (files beside the mapping)
        "grid": {"center_deg": [10, 5], "spacing_deg": [2, 2]},
        "axes": "xy", "first_row": "top",                        (which way the stored grid lies)
        "exclude_gaps": false                                    (optional, as in session.json)
      }
    }

The full mapping format is documented in ``docs/batch.md``. In short: ``responses`` may instead be
``{"kind": "traces", "series": "ophys/Fluorescence/dff"}`` (cell id = the ROI id of each column, from the
series' ``rois`` region; field-of-view labels from the PlaneSegmentation's masks); ``gratings`` may be a
list of table entries, each with an optional ``rows`` filter; a column spec is a name, ``{"column",
"scale", "offset"}`` or a number; blanks are rows with contrast 0 or NaN orientation / SF; the sparse
noise is an ImageSeries (schema order ``(frames, x, y)``), an IndexSeries into template images, or a
TimeSeries ``(frames, ny, nx)``, oriented by ``axes`` and ``first_row`` (a square grid stored as image
data must state ``axes``), with ``luminance`` for stored luminance values.

Every array is validated as the folder loader validates its files; a missing or malformed table, column
or series raises :class:`map2d.errors.BadInput` naming the NWB file, the object and the mapping key.
"""

from __future__ import annotations

import datetime
import json
import math
import os
import warnings
from pathlib import Path

import numpy as np

from .contract import (GRATING_COLUMNS, MANIFEST, GratingTable, Session, SparseNoise, Spikes, Traces, _load_npy,
                       _grid_place, _load_rois, _note, _pair, _read_json_object, _refuse_first, _section,
                       check_frames, check_luminance, check_range,
                       check_grating_columns, check_overlap, check_spikes, check_times, check_traces,
                       frame_gap_mask)
from .errors import BadInput
from .geometry import Grid

__all__ = ["load_nwb", "load_mapping", "load_source", "session_to_nwb", "NWB_STIMULUS_COLUMNS"]

#: Contract columns that the mapping's ``gratings.columns`` maps (onset and offset are the table's
#: ``start_time`` and ``stop_time``).
NWB_STIMULUS_COLUMNS = GRATING_COLUMNS[2:]
MAPPING_KEYS = {"name", "responses", "gratings", "sparse_noise", "notes"}
_SUB_KEYS = {
    "responses.spikes": {"kind", "units"},
    "responses.traces": {"kind", "series"},
    "gratings": {"table", "columns", "phase_origin_deg", "rows"},
    "sparse_noise": {"series", "frames", "times", "grid", "axes", "first_row", "luminance", "exclude_gaps"},
}
_PREFIXES = ("stimulus/presentation/", "stimulus/templates/", "processing/", "intervals/", "acquisition/",
             "analysis/")
INSTALL_HINT = "reading NWB files needs the optional package pynwb: pip install 'map2d[nwb]'"


def _import_pynwb():
    try:
        import pynwb  # noqa: F401
    except ImportError:
        raise BadInput("pynwb", None, INSTALL_HINT) from None
    return pynwb


# ----------------------------------------------------------------------------------------------
# the mapping
# ----------------------------------------------------------------------------------------------
def load_mapping(path) -> dict:
    """Read a mapping JSON file (see the module docstring); the structure is checked by :func:`load_nwb`.

    Returns the mapping with the key ``"_base"`` set to the file's folder (where ``frames``/``times``
    files are looked for) and ``"_where"`` to the file path (named in error messages).
    """
    path = Path(path)
    mapping = _read_json_object(path, missing="mapping file not found")
    return {**mapping, "_base": str(path.parent), "_where": str(path)}


def _name(spec, key, where, section, default=None) -> str:
    if key not in spec:
        if default is not None:
            return default
        raise BadInput(where, f"{section}.{key}", "is missing")
    value = spec[key]
    if not isinstance(value, str) or not value.strip():
        raise BadInput(where, f"{section}.{key}", f"must be a name, got {value!r}")
    return value.strip()


# ----------------------------------------------------------------------------------------------
# finding objects in the file
# ----------------------------------------------------------------------------------------------
def _path_of(obj) -> str:
    parts = []
    while obj is not None and getattr(obj, "parent", None) is not None:
        parts.append(obj.name)
        obj = obj.parent
    return "/".join(reversed(parts))


def _file_path(nwbfile, obj) -> str:
    """Where ``obj`` sits in the file: ``intervals/gratings``, ``processing/ophys/...``, ``units``."""
    top = obj
    while top.parent is not None and top.parent is not nwbfile:
        top = top.parent
    chain = _path_of(obj)
    for group, members in (("processing", nwbfile.processing), ("acquisition", nwbfile.acquisition),
                           ("stimulus/presentation", nwbfile.stimulus),
                           ("stimulus/templates", nwbfile.stimulus_template), ("analysis", nwbfile.analysis),
                           ("intervals", nwbfile.intervals)):
        if any(m is top for m in members.values()):
            return f"{group}/{chain}"
    return chain


def _find(nwbfile, ref: str, types, what: str, nwb_path, key: str):
    """The object of one of ``types`` that ``ref`` names (path or unique bare name), else BadInput."""
    ref = ref.strip().strip("/")
    short = ref
    for p in _PREFIXES:
        if short.startswith(p):
            short = short[len(p):]
            break
    objs = [o for o in nwbfile.objects.values() if isinstance(o, types)]
    paths = {id(o): _file_path(nwbfile, o) for o in objs}
    hits = [o for o in objs if paths[id(o)] in (ref, short) or _path_of(o) in (ref, short)]
    if not hits and "/" not in ref:
        hits = [o for o in objs if o.name == ref]
    if len(hits) == 1:
        return hits[0]
    if len(hits) > 1:
        shown = ", ".join(sorted(paths[id(o)] for o in hits))
        raise BadInput(nwb_path, ref, f"{what} name is ambiguous ({shown}); give its path (mapping {key})")
    have = ", ".join(sorted(paths[id(o)] for o in objs)) or "none"
    raise BadInput(nwb_path, ref, f"{what} not found (mapping {key}); the file has: {have}")


def _series_times(series, n, nwb_path, ref):
    """Sample times of a TimeSeries: its timestamps, or starting_time + k / rate."""
    if series.timestamps is not None:
        times = np.asarray(series.timestamps[:])
        return check_times(times, nwb_path, f"{ref}.timestamps", expected=n)
    rate = series.rate
    if rate is None or not (np.isfinite(rate) and rate > 0):
        raise BadInput(nwb_path, ref, f"has neither timestamps nor a positive rate (rate = {rate})")
    start = float(series.starting_time or 0.0)
    if not math.isfinite(start):
        raise BadInput(nwb_path, f"{ref}.starting_time", "is not finite")
    return start + np.arange(n, dtype=np.float64) / float(rate)


# ----------------------------------------------------------------------------------------------
# the parts of a session
# ----------------------------------------------------------------------------------------------
def _read_spikes(nwbfile, spec, nwb_path, where, notes) -> Spikes:
    from pynwb.misc import Units
    ref = _name(spec, "units", where, "responses", default="units")
    units = _find(nwbfile, ref, Units, "units table", nwb_path, "responses.units")
    upath = _file_path(nwbfile, units)
    if "spike_times" not in units.colnames:
        raise BadInput(nwb_path, f"{upath}.spike_times", "column is missing (the units table holds no spike times)")
    ids = np.asarray(units.id[:])
    if ids.size == 0:
        raise BadInput(nwb_path, upath, "holds no units: there is no cell to analyze")
    if ids.dtype.kind not in "iu":
        raise BadInput(nwb_path, f"{upath}.id", f"must hold integers, got {ids.dtype}")
    ids = ids.astype(np.int64)
    if np.unique(ids).size != ids.size:
        raise BadInput(nwb_path, f"{upath}.id", "unit ids are not unique")
    col = units["spike_times"]
    if hasattr(col, "target"):          # ragged column: flat times + end offsets per unit
        t = np.asarray(col.target.data[:])
        ends = np.asarray(col.data[:], dtype=np.int64)
    else:
        raise BadInput(nwb_path, f"{upath}.spike_times", "must be a ragged column of spike times per unit")
    if ends.size != ids.size or (ends.size and (np.any(np.diff(ends) < 0) or ends[-1] != t.size)):
        raise BadInput(nwb_path, f"{upath}.spike_times_index", "does not match the spike times")
    if t.ndim != 1 or t.dtype.kind not in "iuf":
        raise BadInput(nwb_path, f"{upath}.spike_times", f"must be numbers, got {t.dtype} {t.shape}")
    t = t.astype(np.float64)
    _refuse_first(~np.isfinite(t), nwb_path, f"{upath}.spike_times", "is not finite")
    check_range(t, "time_s", nwb_path, f"{upath}.spike_times")
    check_range(ids, "cell_id", nwb_path, f"{upath}.id")
    cell = np.repeat(ids, np.diff(np.concatenate([[0], ends])))
    return check_spikes(t, cell, np.unique(ids), notes, f"{nwb_path}: {upath}", unit="unit")


def _read_traces(nwbfile, spec, nwb_path, where, notes):
    """Traces of a response series: cell id = the ROI id of each column (the series' ``rois`` region
    into its PlaneSegmentation), else the column number; columns are put in id order. Also returns
    the field-of-view label image from the ROI masks (None when the masks say nothing)."""
    from pynwb import TimeSeries
    ref = _name(spec, "series", where, "responses")
    series = _find(nwbfile, ref, TimeSeries, "response series", nwb_path, "responses.series")
    spath = _file_path(nwbfile, series)
    data = np.asarray(series.data[:])
    if data.ndim == 1:
        data = data[:, None]
    if data.ndim != 2:
        raise BadInput(nwb_path, f"{spath}.data", f"must have shape (samples, rois), got {data.shape}")
    if data.dtype.kind not in "iuf":
        raise BadInput(nwb_path, f"{spath}.data", f"must be numeric, got {data.dtype}")
    if data.shape[1] == 0:
        raise BadInput(nwb_path, f"{spath}.data", f"has no ROIs (shape {data.shape})")
    if data.shape[0] < 2:
        raise BadInput(nwb_path, f"{spath}.data", f"needs at least two samples, got {data.shape[0]}")
    times = _series_times(series, data.shape[0], nwb_path, spath)
    ids, rows, table = None, None, None
    region = getattr(series, "rois", None)
    if region is not None:
        rows = np.asarray(region.data[:], dtype=np.int64).reshape(-1)
        table = region.table
        all_ids = np.asarray(table.id[:], dtype=np.int64)
        if rows.size != data.shape[1]:
            raise BadInput(nwb_path, f"{spath}.rois", f"names {rows.size} ROIs but the data has {data.shape[1]} "
                                                      f"columns")
        if rows.size and (rows.min() < 0 or rows.max() >= all_ids.size):
            raise BadInput(nwb_path, f"{spath}.rois", f"points past the {all_ids.size} rows of its ROI table")
        ids = all_ids[rows]
        if np.unique(ids).size != ids.size:
            raise BadInput(nwb_path, f"{spath}.rois", "names an ROI twice")
    values = np.ascontiguousarray(data.T, dtype=np.float32)           # (cells, samples)
    if ids is not None:
        order = np.argsort(ids, kind="stable")
        values, ids, rows = values[order], ids[order], rows[order]
        if np.array_equal(ids, np.arange(ids.size)):
            ids = None                                                  # ids are the column numbers
    traces = check_traces(values, times, notes, f"{nwb_path}: {spath}", row_word="ROI", ids=ids)
    labels = (_roi_labels(table, rows, traces.cell_ids, nwb_path, notes, nwbfile=nwbfile)
              if table is not None else None)
    return traces, labels


def _plane_size(nwbfile, table):
    """Size ``(nx, ny)`` of the imaging plane a PlaneSegmentation's masks apply to, as the file states it,
    and where it was read: a TwoPhotonSeries over the same ``imaging_plane`` (its ``dimension``, number
    of pixels on x, y; else its data's frame shape, ImageSeries data being (frame, x, y)), else the
    segmentation's ``reference_images`` (dimension or frame shape). None when nothing states it."""
    def size_of(series):
        dim = getattr(series, "dimension", None)
        if dim is not None:
            d = np.asarray(dim[:] if hasattr(dim, "shape") else dim).reshape(-1)
            if d.size >= 2 and d[0] > 0 and d[1] > 0:
                return (int(d[0]), int(d[1])), "dimension"
        shape = getattr(getattr(series, "data", None), "shape", None)
        if shape is not None and len(shape) >= 3 and shape[1] > 0 and shape[2] > 0:
            return (int(shape[1]), int(shape[2])), "data"
        return None, None

    plane = getattr(table, "imaging_plane", None)
    if nwbfile is not None and plane is not None:
        from pynwb.ophys import TwoPhotonSeries
        for obj in nwbfile.objects.values():
            if isinstance(obj, TwoPhotonSeries) and obj.imaging_plane is plane:
                size, field = size_of(obj)
                if size is not None:
                    return size, f"{_file_path(nwbfile, obj)}.{field}"
    refs = getattr(table, "reference_images", None)
    for series in (refs.values() if isinstance(refs, dict) else refs or ()):
        size, field = size_of(series)
        if size is not None:
            where = _file_path(nwbfile, series) if nwbfile is not None else series.name
            return size, f"{where}.{field}"
    return None, None


def _roi_labels(table, rows, cell_ids, nwb_path, notes, nwbfile=None):
    """Label image ``(y, x)`` of the field of view from a PlaneSegmentation's ``image_mask`` (ROI, x, y)
    or ``pixel_mask`` (x, y, weight) rows: label = cell id + 1 (0 = no ROI); where masks overlap the
    larger weight wins. The image spans the whole imaging plane: an image mask's own shape, else the
    plane's size as the file states it (``_plane_size``); only when nothing states it, the masks'
    extent (with a note). None when the table has no masks or every mask is empty."""
    cols = set(getattr(table, "colnames", ()))
    masks = []
    if "image_mask" in cols:
        col = table["image_mask"]
        for r in rows:
            m = np.asarray(col[int(r)], dtype=np.float64)
            if m.ndim != 2:
                return None
            yy, xx = np.nonzero(m.T > 0)
            masks.append((yy, xx, m.T[yy, xx]))
    elif "pixel_mask" in cols:
        col = table["pixel_mask"]
        for r in rows:
            px = col[int(r)]
            arr = np.array([(p[0], p[1], p[2]) for p in px], dtype=np.float64).reshape(-1, 3)
            keep = arr[:, 2] > 0
            masks.append((arr[keep, 1].astype(np.int64), arr[keep, 0].astype(np.int64), arr[keep, 2]))
    else:
        return None
    if not any(m[0].size for m in masks):
        return None
    ny = 1 + max(int(m[0].max()) for m in masks if m[0].size)
    nx = 1 + max(int(m[1].max()) for m in masks if m[1].size)
    if "image_mask" in cols:
        shape = np.asarray(table["image_mask"][int(rows[0])]).shape
        nx, ny = max(nx, shape[0]), max(ny, shape[1])
    else:
        tpath = _file_path(nwbfile, table) if nwbfile is not None else getattr(table, "name", "PlaneSegmentation")
        size, stated = _plane_size(nwbfile, table)
        if size is None:
            _note(notes, f"{nwb_path}: {tpath}: the imaging plane's size is not stated (no TwoPhotonSeries "
                         f"dimension or data over its imaging plane, no reference_images); the field-of-view "
                         f"maps span the masks' extent ({ny} x {nx} pixels)")
        elif nx > size[0] or ny > size[1]:
            raise BadInput(nwb_path, f"{tpath}.pixel_mask", f"has pixels past the imaging plane's "
                                                            f"{size[0]} x {size[1]} (x, y) pixels stated by {stated}")
        else:
            nx, ny = size
    labels = np.zeros((ny, nx), dtype=np.int64)
    best = np.zeros((ny, nx))
    for cid, (yy, xx, w) in zip(cell_ids, masks):
        win = w > best[yy, xx]
        labels[yy[win], xx[win]] = int(cid) + 1
        best[yy[win], xx[win]] = w[win]
    return labels


_COLUMN_SPEC_KEYS = {"column", "scale", "offset"}


def _number(spec, key, where, full, default):
    v = spec.get(key, default)
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
        raise BadInput(where, f"{full}.{key}", f"must be a finite number, got {v!r}")
    return float(v)


def _column(table, tpath, spec, contract_name, nwb_path, rows, where="mapping"):
    """Values of one stimulus column for the selected ``rows``: a column name, ``{"column", "scale",
    "offset"}`` (value x scale + offset) or a constant number. NaN is kept (a blank, judged by the
    caller); infinite values are refused at the row's id."""
    key = f"gratings.columns.{contract_name}"
    scale, offset = 1.0, 0.0
    if isinstance(spec, bool):
        raise BadInput(where, key, f"must be a column name, {{'column', 'scale', 'offset'}} or a number, "
                                   f"got {spec!r}")
    if isinstance(spec, (int, float)):
        if not math.isfinite(spec):
            raise BadInput(where, key, "must be finite")
        return np.full(rows.size, float(spec))
    if isinstance(spec, dict):
        unknown = sorted(set(spec) - _COLUMN_SPEC_KEYS)
        if unknown:
            raise BadInput(where, f"{key}.{unknown[0]}", "unknown key (known: column, scale, offset)")
        if "column" not in spec:
            raise BadInput(where, f"{key}.column", "is missing")
        scale = _number(spec, "scale", where, key, 1.0)
        offset = _number(spec, "offset", where, key, 0.0)
        spec = spec["column"]
    if not isinstance(spec, str) or not spec.strip():
        raise BadInput(where, key, f"must be a column name, {{'column', 'scale', 'offset'}} or a number, "
                                   f"got {spec!r}")
    name = spec.strip()
    if name not in table.colnames and name not in ("start_time", "stop_time"):
        raise BadInput(nwb_path, f"{tpath}.{name}",
                       f"column is missing (mapping {key}); the table has: {', '.join(table.colnames)}")
    values = np.asarray(table[name].data[:])
    if values.ndim != 1 or values.dtype.kind not in "iuf":
        raise BadInput(nwb_path, f"{tpath}.{name}", f"must be one number per row, got {values.dtype} {values.shape}")
    values = values[rows].astype(np.float64) * scale + offset
    ids = np.asarray(table.id[:])[rows]
    bad = np.flatnonzero(np.isinf(values))
    if bad.size:
        raise BadInput(nwb_path, f"{tpath}.{name}", "is not finite", row=f"id {int(ids[bad[0]])}")
    return values


def _row_filter(table, tpath, spec, nwb_path, where, section):
    """Indices of the rows a ``rows`` filter ``{column: value or [values]}`` keeps (all rows without)."""
    n = len(table)
    keep = np.ones(n, dtype=bool)
    flt = spec.get("rows")
    if flt is None:
        return np.flatnonzero(keep)
    if not isinstance(flt, dict) or not flt:
        raise BadInput(where, f"{section}.rows", "must be a JSON object {column: value or [values]}")
    for col, want in flt.items():
        if col not in table.colnames:
            raise BadInput(nwb_path, f"{tpath}.{col}", f"column is missing (mapping {section}.rows); the table "
                                                       f"has: {', '.join(table.colnames)}")
        wanted = want if isinstance(want, list) else [want]
        values = np.asarray(table[col].data[:])
        if values.dtype.kind in "SO":
            values = np.array([v.decode() if isinstance(v, bytes) else v for v in values], dtype=object)
        keep &= np.isin(values, np.asarray(wanted, dtype=object if values.dtype == object else None))
    if not keep.any():
        raise BadInput(nwb_path, tpath, f"no row matches the filter (mapping {section}.rows = {flt!r})")
    return np.flatnonzero(keep)


def _read_one_table(nwbfile, spec, nwb_path, where, section, notes):
    """One TimeIntervals table of a ``gratings`` entry: contract columns (blanks marked) and row ids."""
    from pynwb.epoch import TimeIntervals
    ref = _name(spec, "table", where, section)
    table = _find(nwbfile, ref, TimeIntervals, "TimeIntervals table", nwb_path, f"{section}.table")
    tpath = _file_path(nwbfile, table)
    columns = spec.get("columns", {})
    if not isinstance(columns, dict):
        raise BadInput(where, f"{section}.columns", f"must be a JSON object, got {type(columns).__name__}")
    unknown = sorted(set(columns) - set(NWB_STIMULUS_COLUMNS))
    if unknown:
        raise BadInput(where, f"{section}.columns.{unknown[0]}",
                       f"unknown key (known: {', '.join(NWB_STIMULUS_COLUMNS)})")
    if len(table) == 0:
        raise BadInput(nwb_path, tpath, "has no presentations")
    rows = _row_filter(table, tpath, spec, nwb_path, where, section)
    data = {}
    for c in ("start_time", "stop_time"):
        if c not in table.colnames:
            raise BadInput(nwb_path, f"{tpath}.{c}", "column is missing")
    data["onset_s"] = _column(table, tpath, "start_time", "onset_s", nwb_path, rows)
    data["offset_s"] = _column(table, tpath, "stop_time", "offset_s", nwb_path, rows)
    for c in NWB_STIMULUS_COLUMNS:
        data[c] = _column(table, tpath, columns.get(c, c), c, nwb_path, rows, where)
    ids = np.asarray(table.id[:])[rows]
    for c in ("onset_s", "offset_s", "contrast"):
        name = {"onset_s": "start_time", "offset_s": "stop_time"}.get(c, f"{tpath} ({c})")
        bad = np.flatnonzero(np.isnan(data[c]))
        if bad.size:
            raise BadInput(nwb_path, name if "(" in name else f"{tpath}.{name}", "is not finite",
                           row=f"id {int(ids[bad[0]])}")
    # a blank: contrast 0, or no orientation / spatial frequency (NaN); its other values do not matter
    blank = (data["contrast"] == 0) | np.isnan(data["orientation_deg"]) | np.isnan(data["sf_cpd"])
    n_nan_blank = int(np.count_nonzero(blank & (data["contrast"] != 0)))
    if n_nan_blank:
        _note(notes, f"{nwb_path}: {tpath}: {n_nan_blank} presentations without orientation or spatial "
                     f"frequency (NaN) are blanks (contrast 0)")
    data["contrast"] = np.where(blank, 0.0, data["contrast"])
    for c in ("orientation_deg", "sf_cpd", "phase_deg", "tf_hz"):
        nan = np.isnan(data[c])
        bad = np.flatnonzero(nan & ~blank)
        if bad.size:
            raise BadInput(nwb_path, f"{tpath} ({c})", "is not finite (NaN is allowed only in blanks)",
                           row=f"id {int(ids[bad[0]])}")
        data[c] = np.where(nan, 0.0, data[c])
    try:
        check_grating_columns(data, nwb_path, {"offset_s": f"{tpath}.stop_time", "sf_cpd": f"{tpath} (sf_cpd)",
                                               "contrast": f"{tpath} (contrast)"}, onset_name="start_time")
    except BadInput as exc:                         # name the row by its id in the file
        raise BadInput(exc.file, exc.field, exc.detail,
                       row=None if exc.row is None else f"id {int(ids[int(exc.row) - 1])}") from None
    return data, tpath


def _read_gratings(nwbfile, spec, nwb_path, where, default_origin, notes) -> GratingTable:
    """The ``gratings`` entry: one table spec, or a list of them (e.g. flashed and drifting tables),
    joined in onset order."""
    specs = spec if isinstance(spec, list) else [spec]
    if not specs:
        raise BadInput(where, "gratings", "is an empty list")
    parts, origins, paths = [], [], []
    for i, one in enumerate(specs):
        section = "gratings" if not isinstance(spec, list) else f"gratings[{i}]"
        one = _section(where, one, section, notes, known_as="gratings", known=_SUB_KEYS)
        data, tpath = _read_one_table(nwbfile, one, nwb_path, where, section, notes)
        parts.append(data)
        paths.append(tpath)
        if one.get("phase_origin_deg") is not None:
            origins.append(_pair(one["phase_origin_deg"], where, f"{section}.phase_origin_deg"))
    if len(set(origins)) > 1:
        raise BadInput(where, "gratings.phase_origin_deg", f"differs between the tables: {origins}")
    data = {c: np.concatenate([p[c] for p in parts]) for c in GRATING_COLUMNS}
    n = data["onset_s"].size
    what = " + ".join(paths)
    keys = np.column_stack([data[c] for c in GRATING_COLUMNS])
    _, first = np.unique(keys, axis=0, return_index=True)
    if first.size < n:
        keep = np.zeros(n, dtype=bool)
        keep[first] = True
        _note(notes, f"{nwb_path}: {what}: {n - first.size} rows repeat an earlier row exactly; the repeats "
                     f"are dropped")
        data = {c: v[keep] for c, v in data.items()}
    order = np.argsort(data["onset_s"], kind="stable")
    if np.any(order != np.arange(order.size)):
        if len(parts) == 1:
            _note(notes, f"{nwb_path}: {what}: rows are not in onset order; sorted by start_time")
        data = {c: v[order] for c, v in data.items()}
    if order.size > 1:
        overlap = np.flatnonzero(data["onset_s"][1:] < data["offset_s"][:-1] - 1e-9)
        if overlap.size:
            _note(notes, f"{nwb_path}: {what}: {overlap.size} presentations overlap the previous one")
    origin = origins[0] if origins else default_origin
    return GratingTable(**data, phase_origin_deg=origin)


class _Movie:
    """Stored frames ``(frames, d1, d2)`` read a block at a time and turned to ``(frames, ny, nx)``
    with row 0 at the top: transposed when stored ``(frames, x, y)`` (``axes = "xy"``), flipped when
    the first stored row is the bottom one. What :func:`map2d.contract.check_frames` reads."""

    ndim = 3

    def __init__(self, read, stored_shape, dtype, axes="yx", first_row="top"):
        self._read = read
        self.dtype = np.dtype(dtype)
        n, d1, d2 = (int(v) for v in stored_shape)
        self.shape = (n, d2, d1) if axes == "xy" else (n, d1, d2)
        self.axes, self.first_row = axes, first_row

    def __len__(self):
        return self.shape[0]

    def __getitem__(self, key):
        if not isinstance(key, slice) or key.step not in (None, 1):
            raise TypeError("stored frames are read by slices of consecutive frames")
        a, b, _ = key.indices(self.shape[0])
        blk = np.asarray(self._read(a, max(a, b)))
        if self.axes == "xy":
            blk = blk.transpose(0, 2, 1)
        if self.first_row == "bottom":
            blk = blk[:, ::-1, :]
        return np.ascontiguousarray(blk)


def _h5_reader(nwb_path, dataset: str):
    """``read(a, b)``: rows ``a:b`` of an HDF5 dataset, opening the file for each read (a session
    object holds no open file, and a forked worker gets no shared handle)."""
    def read(a, b):
        import h5py
        with h5py.File(nwb_path, "r") as fh:
            return fh[dataset][a:b]
    return read


def _orientation(spec, where, stored_shape, declared):
    """``(axes, first_row)`` of a stored movie from the mapping, checked against the declared grid.

    ``declared`` is ``"xy"`` for image data whose dimension order the NWB schema declares
    ``(frames, x, y)`` (ImageSeries, Images), None for data of no declared order (a plain TimeSeries,
    ``.npy`` files: the session folder's ``(frames, ny, nx)``). A square grid in the schema's order
    without ``sparse_noise.axes`` is refused: its data cannot show which way it lies."""
    axes = spec.get("axes")
    if axes is not None and axes not in ("yx", "xy"):
        raise BadInput(where, "sparse_noise.axes", f"must be 'yx' (frames, y, x) or 'xy' (frames, x, y), "
                                                   f"got {axes!r}")
    first_row = spec.get("first_row", "top")
    if first_row not in ("top", "bottom"):
        raise BadInput(where, "sparse_noise.first_row", f"must be 'top' or 'bottom', got {first_row!r}")
    d1, d2 = (int(v) for v in stored_shape[1:3])
    size = spec["grid"].get("size")
    if size is not None:
        try:
            nx, ny = (int(v) for v in size)
            if [nx, ny] != [float(v) for v in size] or nx < 1 or ny < 1:
                raise ValueError
        except (TypeError, ValueError):
            raise BadInput(where, "sparse_noise.grid.size", f"must be [nx, ny], two positive integers, got "
                                                            f"{size!r}") from None
        fits = {"xy": (d1, d2) == (nx, ny), "yx": (d1, d2) == (ny, nx)}
        if axes is None and nx != ny:
            axes = "xy" if fits["xy"] else "yx" if fits["yx"] else None
            if axes is None:
                raise BadInput(where, "sparse_noise.grid.size", f"[{nx}, {ny}] does not match the stored frames "
                                                                f"{tuple(stored_shape)}")
        elif axes is not None and not fits[axes]:
            raise BadInput(where, "sparse_noise.grid.size", f"[{nx}, {ny}] does not match the stored frames "
                                                            f"{tuple(stored_shape)} read as axes '{axes}'")
    if axes is None:
        if declared == "xy" and d1 == d2:
            raise BadInput(where, "sparse_noise.axes",
                           f"is needed: the frames {tuple(stored_shape)} are a square grid stored as image data, "
                           f"which the NWB schema orders (frames, x, y), and the data cannot show which way "
                           f"they lie; set sparse_noise.axes ('xy' for (frames, x, y), 'yx' for (frames, y, x)) "
                           f"and sparse_noise.first_row ('top' or 'bottom')")
        axes = declared or "yx"
    return axes, first_row


def _templates(series, nwb_path, spath):
    """The template images of an IndexSeries, ``(templates, d1, d2)`` in file order, and whether the
    schema declares them ``(x, y)``."""
    images = getattr(series, "indexed_images", None)
    if images is not None:
        order = getattr(images, "order_of_images", None)
        if order is not None:
            members = list(order.data[:])
        else:
            members = list(images.images.values())
            if len(members) > 1:
                raise BadInput(nwb_path, f"{_path_of(images)}.order_of_images",
                               "is missing: the Images container does not say the order of its templates, so "
                               "the indices of the IndexSeries point nowhere defined")
        arrays = [np.asarray(m.data[:]) for m in members]
        shapes = {a.shape for a in arrays}
        if len(shapes) != 1 or arrays[0].ndim != 2:
            raise BadInput(nwb_path, _path_of(images), f"templates must be 2-D images of one shape, got "
                                                       f"{sorted(shapes)}")
        return np.stack(arrays), "xy"
    ts = getattr(series, "indexed_timeseries", None)
    if ts is not None:
        data = np.asarray(ts.data[:])
        if data.ndim != 3:
            raise BadInput(nwb_path, f"{_path_of(ts)}.data", f"must hold (templates, x, y), got {data.shape}")
        return data, "xy"
    raise BadInput(nwb_path, spath, "is an IndexSeries without indexed_images or indexed_timeseries")


def _read_sparse_noise(nwbfile, spec, nwb_path, where, base, notes) -> SparseNoise:
    if "grid" not in spec:
        raise BadInput(where, "sparse_noise.grid", "is missing (the grid centre and spacing in degrees)")
    grid_spec = spec["grid"]
    if not isinstance(grid_spec, dict):
        raise BadInput(where, "sparse_noise.grid", "must be a JSON object")
    for k in sorted(set(grid_spec) - {"center_deg", "spacing_deg", "size"}):
        _note(notes, f"{where}: unknown key 'sparse_noise.grid.{k}' ignored")
    cx, cy, dx, dy = _grid_place(grid_spec, where)
    exclude_gaps = spec.get("exclude_gaps", False)
    if not isinstance(exclude_gaps, bool):
        raise BadInput(where, "sparse_noise.exclude_gaps", f"must be true or false, got {exclude_gaps!r}")
    luminance = (check_luminance(spec["luminance"], where) if spec.get("luminance") is not None else None)
    if "series" in spec:
        if "frames" in spec or "times" in spec:
            raise BadInput(where, "sparse_noise", "give either series or frames + times, not both")
        from pynwb import TimeSeries
        from pynwb.image import ImageSeries, IndexSeries
        ref = _name(spec, "series", where, "sparse_noise")
        series = _find(nwbfile, ref, TimeSeries, "stimulus series", nwb_path, "sparse_noise.series")
        spath = _file_path(nwbfile, series)
        fwhere, fkey = nwb_path, f"{spath}.data"
        if isinstance(series, IndexSeries):
            templates, declared = _templates(series, nwb_path, spath)
            idx = np.asarray(series.data[:])
            if idx.ndim != 1 or idx.dtype.kind not in "iu":
                raise BadInput(nwb_path, fkey, f"must hold one integer template index per frame, got "
                                               f"{idx.dtype} {idx.shape}")
            _refuse_first((idx < 0) | (idx >= templates.shape[0]), nwb_path, fkey,
                          f"template index out of range (there are {templates.shape[0]} templates)")
            stored = (idx.size,) + templates.shape[1:]
            read = (lambda a, b: templates[idx[a:b]])                  # one block at a time, never the movie
            dtype = templates.dtype
        else:
            if isinstance(series, ImageSeries) and getattr(series, "external_file", None) is not None:
                raise BadInput(nwb_path, spath, "stores its frames in external files; map2d reads frames stored "
                                                "in the NWB file")
            data = series.data
            stored, dtype = tuple(data.shape), data.dtype
            declared = "xy" if isinstance(series, ImageSeries) else None
            name = getattr(data, "name", None)
            read = (_h5_reader(nwb_path, name) if isinstance(name, str) and hasattr(data, "id")
                    else (lambda a, b, d=data: np.asarray(d[a:b])))
        if len(stored) != 3:
            raise BadInput(nwb_path, fkey, f"must hold (frames, x, y) or (frames, y, x) images, got shape {stored}")
        times = _series_times(series, stored[0], nwb_path, spath)
    else:
        base = Path(base)
        frames_rel = _name(spec, "frames", where, "sparse_noise")
        times_rel = _name(spec, "times", where, "sparse_noise")
        data = _load_npy(base, frames_rel, "frames", mmap=True)
        fwhere, fkey = base / frames_rel, "frames"
        if data.ndim != 3:
            raise BadInput(fwhere, fkey, f"must have shape (frames, ny, nx), got {data.shape}")
        times = check_times(_load_npy(base, times_rel, "times"), base / times_rel, "times",
                            expected=data.shape[0])
        stored, dtype, declared = data.shape, data.dtype, None
        read = (lambda a, b: data[a:b])
    axes, first_row = _orientation(spec, where, stored, declared)
    movie = _Movie(read, stored, dtype, axes, first_row)
    frames = check_frames(movie, fwhere, fkey, luminance=luminance)
    grid = Grid(ny=frames.shape[1], nx=frames.shape[2], center_x_deg=cx, center_y_deg=cy, dx_deg=dx, dy_deg=dy)
    valid = frame_gap_mask(times, exclude_gaps, notes, f"{fwhere}: sparse-noise times", "in the mapping")
    return SparseNoise(frames=frames, times_s=times, grid=grid, valid=valid)


# ----------------------------------------------------------------------------------------------
# public entry points
# ----------------------------------------------------------------------------------------------
def load_nwb(nwb_path, mapping) -> Session:
    """Build and validate a :class:`~map2d.contract.Session` from an NWB file and a mapping.

    Parameters
    ----------
    nwb_path : str or Path
        The NWB (HDF5) file.
    mapping : dict or str or Path
        The mapping (module docstring), or the path of its JSON file. Relative ``frames``/``times``
        files are looked for beside the mapping file (or in ``mapping["_base"]``).

    Returns
    -------
    Session
        ``path`` is the NWB file; ``name`` the mapping's ``name``, else the file's ``session_id``,
        else the file name without ``.nwb``.

    Raises
    ------
    BadInput
        Naming the NWB file (or the mapping) and the table, column, series or key at fault.
    """
    _import_pynwb()
    from pynwb import NWBHDF5IO

    if not isinstance(mapping, dict):
        mapping = load_mapping(mapping)
    where = mapping.get("_where", "mapping")
    base = Path(mapping.get("_base", "."))
    nwb_path = Path(nwb_path)
    if not nwb_path.is_file():
        raise BadInput(nwb_path, None, "NWB file not found")
    notes: list = []
    for key in sorted(set(mapping) - MAPPING_KEYS - {"_base", "_where"}):
        _note(notes, f"{where}: unknown key '{key}' ignored")
    if mapping.get("responses") is None:
        raise BadInput(where, "responses", "is missing (every session needs responses)")
    resp = mapping["responses"]
    if not isinstance(resp, dict):
        raise BadInput(where, "responses", f"must be a JSON object, got {type(resp).__name__}")
    kind = resp.get("kind")
    if kind not in ("spikes", "traces"):
        raise BadInput(where, "responses.kind", f"must be 'spikes' or 'traces', got {kind!r}")
    _section(where, resp, "responses", notes, known_as=f"responses.{kind}", known=_SUB_KEYS)
    try:
        io = NWBHDF5IO(str(nwb_path), "r", load_namespaces=True)
    except Exception as exc:
        raise BadInput(nwb_path, None, f"not a readable NWB file ({type(exc).__name__}: {exc})") from None
    with io, warnings.catch_warnings():
        warnings.filterwarnings("ignore", module="hdmf")
        warnings.filterwarnings("ignore", module="pynwb")
        try:
            nwbfile = io.read()
        except Exception as exc:
            raise BadInput(nwb_path, None, f"not a readable NWB file ({type(exc).__name__}: {exc})") from None
        labels = None
        if kind == "spikes":
            responses = _read_spikes(nwbfile, resp, nwb_path, where, notes)
        else:
            responses, labels = _read_traces(nwbfile, resp, nwb_path, where, notes)
        sparse = None
        if mapping.get("sparse_noise") is not None:
            spec = _section(where, mapping["sparse_noise"], "sparse_noise", notes, known=_SUB_KEYS)
            sparse = _read_sparse_noise(nwbfile, spec, nwb_path, where, base, notes)
        gratings = None
        if mapping.get("gratings") is not None:
            spec = mapping["gratings"]
            origin = (sparse.grid.center_x_deg, sparse.grid.center_y_deg) if sparse is not None else (0.0, 0.0)
            gratings = _read_gratings(nwbfile, spec, nwb_path, where, origin, notes)
        name = mapping.get("name") or nwbfile.session_id or nwb_path.stem
    session = Session(responses=responses, sparse_noise=sparse, gratings=gratings, path=nwb_path,
                      name=str(name), notes=notes, rois=labels, roi_label_offset=1 if labels is not None else 0)
    check_overlap(session, (nwb_path, "spike_times" if kind == "spikes" else "responses"), notes,
                  f"{nwb_path}: spike_times")
    return session


def load_source(source, config=None) -> Session:
    """Load a session from a session folder, a session folder whose ``session.json`` points at an NWB
    file (key ``nwb``), or an ``.nwb`` file with a mapping (``config``).

    Parameters
    ----------
    source : str or Path
        Session folder or ``.nwb`` file.
    config : str or Path or dict, optional
        Mapping for an ``.nwb`` source (required there; refused for a folder).

    Notes
    -----
    The manifest form is ``{"nwb": {"file": "rec.nwb", "mapping": "mapping.json"}}`` (paths relative
    to the folder), where ``mapping`` may also be the mapping object itself. The session's name is the
    manifest's ``name``, else the mapping's, else the folder name.
    """
    from .contract import load_session
    source = Path(source)
    if source.suffix.lower() == ".nwb" and not source.is_dir():
        if config is None:
            raise BadInput(source, "--config", "an NWB file needs a mapping: --config mapping.json "
                                               "(see the README, NWB input)")
        return load_nwb(source, config)
    if config is not None:
        raise BadInput("--config", None, f"applies to .nwb files only, and {source} is not one")
    mpath = source / MANIFEST
    manifest = None
    if mpath.is_file():
        try:
            manifest = _read_json_object(mpath)   # bounded size, depth and numbers
        except BadInput:
            manifest = None  # load_session reports it
    if not (isinstance(manifest, dict) and manifest.get("nwb") is not None):
        return load_session(source)
    spec = manifest["nwb"]
    if not isinstance(spec, dict):
        raise BadInput(mpath, "nwb", f"must be a JSON object with file and mapping, got {type(spec).__name__}")
    file_rel = spec.get("file")
    if not isinstance(file_rel, str) or not file_rel.strip():
        raise BadInput(mpath, "nwb.file", f"must be a file name, got {file_rel!r}")
    early_notes: list = []
    for k in sorted(set(spec) - {"file", "mapping"}):
        _note(early_notes, f"{mpath}: unknown key 'nwb.{k}' ignored")
    m = spec.get("mapping")
    if isinstance(m, str) and m.strip():
        mapping = load_mapping(source / m)
    elif isinstance(m, dict):
        mapping = {**m, "_base": str(source), "_where": f"{mpath} (nwb.mapping)"}
    else:
        raise BadInput(mpath, "nwb.mapping", f"must be a file name or a mapping object, got {m!r}")
    if manifest.get("name") is not None:
        mapping["name"] = manifest["name"]
    mapping.setdefault("name", source.name)
    for key in ("responses", "sparse_noise", "gratings"):
        if manifest.get(key) is not None:
            raise BadInput(mpath, key, "give it in the NWB mapping, not beside the nwb key")
    for key in sorted(set(manifest) - {"nwb", "name", "rois", "notes", "generator"}):
        _note(early_notes, f"{mpath}: unknown key '{key}' ignored")
    session = load_nwb(source / file_rel, mapping)
    session.notes[:0] = early_notes
    if manifest.get("rois") is not None:     # a label image beside the NWB file replaces the file's masks
        spec = manifest["rois"]
        rel, offset = (spec.get("file"), spec.get("label_offset", 0)) if isinstance(spec, dict) else (spec, 0)
        if not isinstance(rel, str) or not rel.strip():
            raise BadInput(mpath, "rois", f"must be a file name or {{\"file\": ..., \"label_offset\": n}}, got {spec!r}")
        if isinstance(offset, bool) or not isinstance(offset, int):
            raise BadInput(mpath, "rois.label_offset", f"must be an integer, got {offset!r}")
        session.rois, session.roi_label_offset = _load_rois(source, rel), int(offset)
    return session


def session_to_nwb(session: Session, path, *, mapping_path=None, identifier: str | None = None,
                   session_start_time: datetime.datetime | None = None) -> dict:
    """Write a session as an NWB file; return the mapping that reads it back with :func:`load_nwb`.

    Parameters
    ----------
    session : Session
        Any loaded or simulated session.
    path : str or Path
        The ``.nwb`` file to write (written beside under a temporary name and renamed when complete).
    mapping_path : str or Path, optional
        Also write the mapping as JSON there.
    identifier : str, optional
        NWB identifier (default ``"map2d-" + session.name``).
    session_start_time : datetime, optional
        Default 2000-01-01 UTC (the session folder holds no date; a fixed default keeps the output
        reproducible).

    Returns
    -------
    dict
        The mapping: units table ``units`` (unit id = cell id) or ``RoiResponseSeries``
        ``ophys/Fluorescence/responses`` (column k = cell k, sample timestamps), the TimeIntervals table
        ``gratings`` with the contract's column names, and the stimulus series ``sparse_noise`` (frames,
        ny, nx; timestamps = frame onsets) with the grid.

    Notes
    -----
    Without an ROI label image (``session.rois``) each imaging ROI gets an all-zero 1 x 1 image mask
    (its place in the field of view is unknown); with one, ROI k gets the pixels labelled k (plus
    ``session.roi_label_offset`` when set).
    """
    _import_pynwb()
    from pynwb import NWBHDF5IO

    path = Path(path)
    start = session_start_time or datetime.datetime(2000, 1, 1, tzinfo=datetime.timezone.utc)
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", module="hdmf")
        warnings.filterwarnings("ignore", module="pynwb")
        nwbfile, mapping = _build_nwbfile(session, identifier, start)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.parent / f".{path.name}.partial-{os.getpid()}"
    try:
        with warnings.catch_warnings():
            warnings.filterwarnings("ignore", module="hdmf")
            warnings.filterwarnings("ignore", module="pynwb")
            with NWBHDF5IO(str(tmp), "w") as io:
                io.write(nwbfile)
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    if mapping_path is not None:
        mapping_path = Path(mapping_path)
        mtmp = mapping_path.parent / f".{mapping_path.name}.partial-{os.getpid()}"
        mtmp.write_text(json.dumps(mapping, indent=2) + "\n", encoding="utf-8")
        os.replace(mtmp, mapping_path)
    return mapping


def _build_nwbfile(session: Session, identifier, start):
    """The in-memory NWBFile of :func:`session_to_nwb` and its mapping."""
    from hdmf.common import VectorData
    from pynwb import NWBFile, TimeSeries
    from pynwb.epoch import TimeIntervals

    nwbfile = NWBFile(session_description=f"map2d session {session.name}",
                      identifier=identifier or f"map2d-{session.name}", session_start_time=start,
                      session_id=str(session.name))
    mapping: dict = {"name": str(session.name)}
    r = session.responses
    if isinstance(r, Spikes):
        order = np.lexsort((r.time_s, r.cell))
        t, c = np.asarray(r.time_s, np.float64)[order], np.asarray(r.cell)[order]
        ids = np.asarray(r.cell_ids, np.int64)
        ends = np.searchsorted(c, ids, side="right")
        begins = np.searchsorted(c, ids, side="left")
        for uid, b, e in zip(ids, begins, ends):    # one row per cell (not per spike)
            nwbfile.add_unit(spike_times=t[b:e], id=int(uid))
        mapping["responses"] = {"kind": "spikes", "units": "units"}
    else:
        from pynwb.ophys import Fluorescence, ImageSegmentation, OpticalChannel, RoiResponseSeries
        device = nwbfile.create_device("microscope", description="two-photon microscope (map2d export)")
        channel = OpticalChannel(name="channel", description="imaging channel", emission_lambda=float("nan"))
        plane = nwbfile.create_imaging_plane("plane", channel, description="imaging plane", device=device,
                                             excitation_lambda=float("nan"), indicator="unknown",
                                             location="unknown")
        module = nwbfile.create_processing_module("ophys", "optical physiology (map2d export)")
        seg = ImageSegmentation()
        module.add(seg)
        n = r.values.shape[0]
        offset = int(getattr(session, "roi_label_offset", 0))
        ref = None
        if session.rois is not None:                                      # states the plane's size (x, y)
            from pynwb.image import ImageSeries
            ref = ImageSeries(name="roi_labels", data=np.ascontiguousarray(np.asarray(session.rois).T[None]),
                              unit="label", rate=1.0,
                              description=f"ROI label image (1, x, y): label = cell id + {offset}, 0 = no ROI")
        ps = seg.create_plane_segmentation("regions of interest", plane, name="rois", reference_images=ref)
        for k in range(n):
            cid = int(r.cell_ids[k])                                      # ROI id = cell id
            if session.rois is not None:
                yy, xx = np.nonzero(np.asarray(session.rois) == cid + offset)
                mask = [(int(x), int(y), 1.0) for x, y in zip(xx, yy)] or [(0, 0, 0.0)]
                ps.add_roi(pixel_mask=mask, id=cid)
            else:
                ps.add_roi(image_mask=np.zeros((1, 1), dtype=np.float32), id=cid)
        region = ps.create_roi_table_region("all ROIs", region=list(range(n)))
        rrs = RoiResponseSeries(name="responses", data=np.ascontiguousarray(np.asarray(r.values, np.float32).T),
                                rois=region, unit="trace units", timestamps=np.asarray(r.times_s, np.float64))
        module.add(Fluorescence(roi_response_series=rrs))
        mapping["responses"] = {"kind": "traces", "series": "ophys/Fluorescence/responses"}
    sn = session.sparse_noise
    if sn is not None:
        g = sn.grid
        nwbfile.add_stimulus(TimeSeries(
            name="sparse_noise", data=np.asarray(sn.frames), unit="spot sign (+1 bright, -1 dark, 0 background)",
            timestamps=np.asarray(sn.times_s, np.float64),
            description=f"sparse noise (frames, ny, nx), row 0 at the top; grid centre "
                        f"({g.center_x_deg:g}, {g.center_y_deg:g}) deg, spacing ({g.dx_deg:g}, {g.dy_deg:g}) deg"))
        mapping["sparse_noise"] = {"series": "sparse_noise", "grid": g.to_manifest(), "axes": "yx",
                                   "first_row": "top"}
        if sn.valid is not None:
            mapping["sparse_noise"]["exclude_gaps"] = True
    gt = session.gratings
    if gt is not None:
        desc = {"onset_s": "onset (s)", "offset_s": "offset (s)", "orientation_deg": "wave-vector angle (deg)",
                "sf_cpd": "spatial frequency (cycles/deg)", "phase_deg": "phase (deg)",
                "contrast": "contrast", "tf_hz": "temporal frequency (Hz); 0 = flashed"}
        cols = [VectorData(name="start_time", description="onset (s)", data=np.asarray(gt.onset_s, np.float64)),
                VectorData(name="stop_time", description="offset (s)", data=np.asarray(gt.offset_s, np.float64))]
        cols += [VectorData(name=c, description=desc[c], data=np.asarray(getattr(gt, c), np.float64))
                 for c in NWB_STIMULUS_COLUMNS]
        cols += [VectorData(name=k, description="extra column of the grating table", data=[str(v) for v in vals])
                 for k, vals in gt.extra.items() if k not in ("start_time", "stop_time", *NWB_STIMULUS_COLUMNS)]
        nwbfile.add_time_intervals(TimeIntervals(name="gratings", description="grating presentations",
                                                 columns=cols))
        mapping["gratings"] = {"table": "gratings", "columns": {c: c for c in NWB_STIMULUS_COLUMNS},
                               "phase_origin_deg": [float(v) for v in gt.phase_origin_deg]}
    return nwbfile, mapping
