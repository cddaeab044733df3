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
        "axes": "yx",                                            (optional: "xy" if data are (frames, nx, ny))
        "exclude_gaps": false                                    (optional, as in session.json)
      }
    }

``responses`` may instead be ``{"kind": "traces", "series": "ophys/Fluorescence/dff"}``: an ophys
``RoiResponseSeries`` (or any TimeSeries) with data ``(samples, rois)``; column k is cell k, sample
times come from its ``timestamps`` or from ``starting_time + k / rate``. Spikes come from the units
table: cell id = unit id, spike times from ``spike_times`` (units without spikes are kept).

Grating presentations: onset and offset from ``start_time`` and ``stop_time``; each of the five
stimulus columns is a column name, ``{"column": NAME, "scale": FACTOR}`` (value x factor, e.g. phase
stored in cycles -> 360), or a plain number used for every row (e.g. ``"tf_hz": 0`` for a flashed
sequence). A column left out of ``columns`` is looked up under the contract's own name
(``orientation_deg`` ...). The sparse-noise series holds ``(frames, ny, nx)`` values -1/0/+1 (row 0 at
the top, as in the session folder) with ``timestamps`` or ``rate`` + ``starting_time``.

NWB objects are named by their path inside the file (``intervals/gratings``,
``processing/ophys/Fluorescence/dff``, ``stimulus/presentation/sparse_noise``; the group prefixes
``intervals/``, ``processing/``, ``acquisition/``, ``stimulus/presentation/`` and
``stimulus/templates/`` may be left out) or by a bare name that is unique in the file.

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
                       _grid_place, _note, _pair, _read_json_object, _refuse_first, _section, check_frames,
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
    "gratings": {"table", "columns", "phase_origin_deg"},
    "sparse_noise": {"series", "frames", "times", "grid", "axes", "exclude_gaps"},
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
        raise BadInput(nwb_path, upath, "holds no units: there is no cell to analyse")
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
    cell = np.repeat(ids, np.diff(np.concatenate([[0], ends])))
    return check_spikes(t, cell, np.unique(ids), notes, f"{nwb_path}: {upath}", unit="unit")


def _read_traces(nwbfile, spec, nwb_path, where, notes) -> Traces:
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
    values = np.ascontiguousarray(data.T, dtype=np.float32)           # (cells, samples)
    return check_traces(values, times, notes, f"{nwb_path}: {spath}", row_word="ROI")


def _column(table, tpath, spec, contract_name, nwb_path, n, where="mapping"):
    """Values of one stimulus column: a column name, {"column", "scale"}, or a constant number."""
    key = f"gratings.columns.{contract_name}"
    scale = 1.0
    if isinstance(spec, bool):
        raise BadInput(where, key, f"must be a column name, {{'column', 'scale'}} or a number, got {spec!r}")
    if isinstance(spec, (int, float)):
        if not math.isfinite(spec):
            raise BadInput(where, key, "must be finite")
        return np.full(n, float(spec))
    if isinstance(spec, dict):
        if "column" not in spec:
            raise BadInput(where, f"{key}.column", "is missing")
        try:
            scale = float(spec.get("scale", 1.0))
        except (TypeError, ValueError):
            raise BadInput(where, f"{key}.scale", f"must be a number, got {spec.get('scale')!r}") from None
        if not math.isfinite(scale):
            raise BadInput(where, f"{key}.scale", "must be finite")
        spec = spec["column"]
    if not isinstance(spec, str) or not spec.strip():
        raise BadInput(where, key, f"must be a column name, {{'column', 'scale'}} or a number, got {spec!r}")
    name = spec.strip()
    if name not in table.colnames:
        raise BadInput(nwb_path, f"{tpath}.{name}",
                       f"column is missing (mapping {key}); the table has: {', '.join(table.colnames)}")
    values = np.asarray(table[name].data[:])
    if values.ndim != 1 or values.dtype.kind not in "iuf":
        raise BadInput(nwb_path, f"{tpath}.{name}", f"must be one number per row, got {values.dtype} {values.shape}")
    values = values.astype(np.float64) * scale
    _refuse_first(~np.isfinite(values), nwb_path, f"{tpath}.{name}", "is not finite", first_row=1)
    return values


def _read_gratings(nwbfile, spec, nwb_path, where, default_origin, notes) -> GratingTable:
    from pynwb.epoch import TimeIntervals
    ref = _name(spec, "table", where, "gratings")
    table = _find(nwbfile, ref, TimeIntervals, "TimeIntervals table", nwb_path, "gratings.table")
    tpath = _file_path(nwbfile, table)
    columns = spec.get("columns", {})
    if not isinstance(columns, dict):
        raise BadInput(where, "gratings.columns", f"must be a JSON object, got {type(columns).__name__}")
    for k in sorted(set(columns) - set(NWB_STIMULUS_COLUMNS)):
        _note(notes, f"{where}: unknown key 'gratings.columns.{k}' ignored (known: "
                     f"{', '.join(NWB_STIMULUS_COLUMNS)})")
    n = len(table)
    if n == 0:
        raise BadInput(nwb_path, tpath, "has no presentations")
    data = {}
    for c in ("start_time", "stop_time"):
        if c not in table.colnames:
            raise BadInput(nwb_path, f"{tpath}.{c}", "column is missing")
    data["onset_s"] = _column(table, tpath, "start_time", "onset_s", nwb_path, n)
    data["offset_s"] = _column(table, tpath, "stop_time", "offset_s", nwb_path, n)
    for c in NWB_STIMULUS_COLUMNS:
        data[c] = _column(table, tpath, columns.get(c, c), c, nwb_path, n, where)
    check_grating_columns(data, nwb_path, {"offset_s": f"{tpath}.stop_time", "sf_cpd": f"{tpath} (sf_cpd)",
                                           "contrast": f"{tpath} (contrast)"}, onset_name="start_time")
    keys = np.column_stack([data[c] for c in GRATING_COLUMNS])
    _, first = np.unique(keys, axis=0, return_index=True)
    if first.size < n:
        keep = np.zeros(n, dtype=bool)
        keep[first] = True
        _note(notes, f"{nwb_path}: {tpath}: {n - first.size} rows repeat an earlier row exactly; the repeats "
                     f"are dropped")
        data = {c: v[keep] for c, v in data.items()}
    order = np.argsort(data["onset_s"], kind="stable")
    if np.any(order != np.arange(order.size)):
        _note(notes, f"{nwb_path}: {tpath}: rows are not in onset order; sorted by start_time")
        data = {c: v[order] for c, v in data.items()}
    if order.size > 1:
        overlap = np.flatnonzero(data["onset_s"][1:] < data["offset_s"][:-1] - 1e-9)
        if overlap.size:
            _note(notes, f"{nwb_path}: {tpath}: {overlap.size} presentations overlap the previous one")
    origin = (_pair(spec["phase_origin_deg"], where, "gratings.phase_origin_deg")
              if spec.get("phase_origin_deg") is not None else default_origin)
    return GratingTable(**data, phase_origin_deg=origin)


def _read_sparse_noise(nwbfile, spec, nwb_path, where, base, notes) -> SparseNoise:
    if "grid" not in spec:
        raise BadInput(where, "sparse_noise.grid", "is missing (the grid centre and spacing in degrees)")
    grid_spec = spec["grid"]
    if not isinstance(grid_spec, dict):
        raise BadInput(where, "sparse_noise.grid", "must be a JSON object")
    cx, cy, dx, dy = _grid_place(grid_spec, where)
    axes = spec.get("axes", "yx")
    if axes not in ("yx", "xy"):
        raise BadInput(where, "sparse_noise.axes", f"must be 'yx' or 'xy', got {axes!r}")
    exclude_gaps = spec.get("exclude_gaps", False)
    if not isinstance(exclude_gaps, bool):
        raise BadInput(where, "sparse_noise.exclude_gaps", f"must be true or false, got {exclude_gaps!r}")
    if "series" in spec:
        if "frames" in spec or "times" in spec:
            raise BadInput(where, "sparse_noise", "give either series or frames + times, not both")
        from pynwb import TimeSeries
        ref = _name(spec, "series", where, "sparse_noise")
        series = _find(nwbfile, ref, TimeSeries, "stimulus series", nwb_path, "sparse_noise.series")
        spath = _file_path(nwbfile, series)
        frames = np.asarray(series.data[:])
        fwhere, fkey = nwb_path, f"{spath}.data"
        if frames.ndim == 3:
            times = _series_times(series, frames.shape[0], nwb_path, spath)
    else:
        base = Path(base)
        frames_rel = _name(spec, "frames", where, "sparse_noise")
        times_rel = _name(spec, "times", where, "sparse_noise")
        frames = _load_npy(base, frames_rel, "frames")
        fwhere, fkey = base / frames_rel, "frames"
        if frames.ndim == 3:
            times = check_times(_load_npy(base, times_rel, "times"), base / times_rel, "times",
                                expected=frames.shape[0])
    if frames.ndim != 3:
        raise BadInput(fwhere, fkey, f"must have shape (frames, ny, nx), got {frames.shape}")
    if axes == "xy":
        frames = np.ascontiguousarray(frames.transpose(0, 2, 1))
    frames = check_frames(frames, fwhere, fkey)
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
        if kind == "spikes":
            responses = _read_spikes(nwbfile, resp, nwb_path, where, notes)
        else:
            responses = _read_traces(nwbfile, resp, nwb_path, where, notes)
        sparse = None
        if mapping.get("sparse_noise") is not None:
            spec = _section(where, mapping["sparse_noise"], "sparse_noise", notes, known=_SUB_KEYS)
            sparse = _read_sparse_noise(nwbfile, spec, nwb_path, where, base, notes)
        gratings = None
        if mapping.get("gratings") is not None:
            spec = _section(where, mapping["gratings"], "gratings", notes, known=_SUB_KEYS)
            origin = (sparse.grid.center_x_deg, sparse.grid.center_y_deg) if sparse is not None else (0.0, 0.0)
            gratings = _read_gratings(nwbfile, spec, nwb_path, where, origin, notes)
        name = mapping.get("name") or nwbfile.session_id or nwb_path.stem
    session = Session(responses=responses, sparse_noise=sparse, gratings=gratings, path=nwb_path,
                      name=str(name), notes=notes)
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
            manifest = json.loads(mpath.read_text(encoding="utf-8"))
        except (json.JSONDecodeError, UnicodeDecodeError):
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
    session = load_nwb(source / file_rel, mapping)
    session.notes[:0] = early_notes
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
        ps = seg.create_plane_segmentation("regions of interest", plane, name="rois")
        n = r.values.shape[0]
        offset = int(getattr(session, "roi_label_offset", 0))
        for k in range(n):
            if session.rois is not None:
                yy, xx = np.nonzero(np.asarray(session.rois) == k + offset)
                mask = [(int(x), int(y), 1.0) for x, y in zip(xx, yy)] or [(0, 0, 0.0)]
                ps.add_roi(pixel_mask=mask)
            else:
                ps.add_roi(image_mask=np.zeros((1, 1), dtype=np.float32))
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
        mapping["sparse_noise"] = {"series": "sparse_noise", "grid": g.to_manifest()}
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
