"""The session folder: load, validate and write (the only module that knows the file names).

``docs/session-format.md`` describes the format (every key and file, units and conventions); keep it
true when this module changes (``tests/test_session_format.py`` runs its example).
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
import re
import shutil
import warnings
import zipfile
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .errors import BadInput
from .geometry import Display, Grid

__all__ = [
    "SparseNoise", "GratingTable", "Spikes", "Traces", "Session", "InputWarning",
    "load_session", "write_session", "write_table", "read_table", "GRATING_COLUMNS", "add_stimulus",
    "write_stimulus", "load_stimulus", "STIMULUS_MANIFEST", "count_spikes_outside", "find_frame_gaps",
    "GAP_FACTOR", "check_times", "check_frames", "frame_gap_mask", "check_traces", "check_spikes",
    "check_grating_columns", "check_overlap", "StoredFrames", "check_luminance", "parse_number", "check_range",
    "LIMITS",
]

MANIFEST = "session.json"
GRATING_COLUMNS = ("onset_s", "offset_s", "orientation_deg", "sf_cpd", "phase_deg", "contrast", "tf_hz")
KNOWN_TOP_KEYS = {"sparse_noise", "gratings", "responses", "display", "rois", "name", "notes", "generator",
                  "nwb", "timing"}
KNOWN_SUB_KEYS = {
    "sparse_noise": {"frames", "times", "grid", "exclude_gaps", "luminance", "untimed"},
    "sparse_noise.grid": {"center_deg", "spacing_deg"},
    "gratings": {"table", "phase_origin_deg"},
    "responses.spikes": {"kind", "file", "cell_ids"},
    "responses.traces": {"kind", "file", "times", "cell_ids"},
}
#: A frame interval longer than this many median intervals looks like dropped frames.
GAP_FACTOR = 1.5


class InputWarning(UserWarning):
    """Something odd in the input that map2d handled (it is counted and reported, not refused)."""


# ----------------------------------------------------------------------------------------------
# data holders
# ----------------------------------------------------------------------------------------------
@dataclass
class SparseNoise:
    """Sparse-noise (or any noise) frames and their onsets.

    ``frames`` is ``(frames, ny, nx)``: int8 with +1 bright, -1 dark, 0 background for sparse noise,
    or any real values for dense noise. A frame lasts until the next onset; the last one lasts the
    median frame interval.

    ``valid`` is None (every frame is usable) or a boolean mask ``(frames,)``: False for a frame
    whose interval to the next onset is longer than ``GAP_FACTOR`` median intervals (it spans
    dropped frames). The loader sets it when the manifest has ``sparse_noise.exclude_gaps: true``;
    the engines leave frames with ``valid == False`` out.
    """

    frames: np.ndarray
    times_s: np.ndarray
    grid: Grid
    valid: np.ndarray | None = None

    @property
    def n_frames(self) -> int:
        return int(self.frames.shape[0])

    @property
    def frame_interval_s(self) -> float:
        if self.times_s.size < 2:
            return float("nan")
        return float(np.median(np.diff(self.times_s)))

    def frame_ends_s(self) -> np.ndarray:
        ends = np.empty_like(self.times_s)
        ends[:-1] = self.times_s[1:]
        if self.times_s.size:
            ends[-1] = self.times_s[-1] + (self.frame_interval_s if self.times_s.size > 1 else 0.0)
        return ends


@dataclass
class GratingTable:
    """One row per grating presentation (columns of ``gratings.csv``)."""

    onset_s: np.ndarray
    offset_s: np.ndarray
    orientation_deg: np.ndarray
    sf_cpd: np.ndarray
    phase_deg: np.ndarray
    contrast: np.ndarray
    tf_hz: np.ndarray
    phase_origin_deg: tuple[float, float] = (0.0, 0.0)
    extra: dict = field(default_factory=dict)

    def __len__(self) -> int:
        return int(self.onset_s.size)

    @property
    def is_blank(self) -> np.ndarray:
        return self.contrast == 0

    @property
    def is_static(self) -> np.ndarray:
        """Flashed presentations (``tf_hz == 0``), blanks included."""
        return self.tf_hz == 0

    @property
    def is_drifting(self) -> np.ndarray:
        return (self.tf_hz != 0) & (self.contrast != 0)

    def subset(self, mask) -> "GratingTable":
        mask = np.asarray(mask)
        return GratingTable(*(getattr(self, c)[mask] for c in GRATING_COLUMNS),
                            phase_origin_deg=self.phase_origin_deg,
                            extra={k: list(np.asarray(v, dtype=object)[mask]) for k, v in self.extra.items()})

    @classmethod
    def from_columns(cls, phase_origin_deg=(0.0, 0.0), **cols) -> "GratingTable":
        arrays = {c: np.asarray(cols[c], dtype=float) for c in GRATING_COLUMNS}
        n = {a.size for a in arrays.values()}
        if len(n) != 1:
            raise ValueError("grating columns must have equal lengths")
        return cls(**arrays, phase_origin_deg=tuple(float(v) for v in phase_origin_deg))


def _distinct(values) -> np.ndarray:
    """``numpy.unique(values)`` of integers, by a count over their range when that range is not much
    larger than the values (one pass instead of a sort or a hash)."""
    v = np.asarray(values)
    if v.dtype.kind in "iu" and v.size > 1024:
        lo, hi = int(v.min()), int(v.max())
        if hi - lo <= v.size:
            return (np.flatnonzero(np.bincount((v - lo).astype(np.intp, copy=False), minlength=hi - lo + 1))
                    + lo).astype(v.dtype)
    return np.unique(v)


@dataclass
class Spikes:
    """Spike times (s) and the cell each belongs to."""

    time_s: np.ndarray
    cell: np.ndarray
    cell_ids: np.ndarray | None = None  # all cells, including any with no spikes

    def __post_init__(self):
        if self.cell_ids is None:
            self.cell_ids = _distinct(self.cell)
        self.cell_ids = np.asarray(self.cell_ids, dtype=np.int64)

    kind = "spikes"
    unit = "spikes/s"


@dataclass
class Traces:
    """Imaging traces ``(cells, samples)`` sampled at ``times_s``; cell ids are the row numbers, or
    ``ids`` (one increasing integer per row, e.g. the ROI ids of an NWB response series)."""

    values: np.ndarray
    times_s: np.ndarray
    ids: np.ndarray | None = None

    kind = "traces"
    unit = "trace units"

    @property
    def cell_ids(self) -> np.ndarray:
        if self.ids is not None:
            return np.asarray(self.ids, dtype=np.int64)
        return np.arange(self.values.shape[0], dtype=np.int64)


@dataclass
class Session:
    """A loaded, validated session folder."""

    responses: Spikes | Traces
    sparse_noise: SparseNoise | None = None
    gratings: GratingTable | None = None
    display: Display | None = None
    rois: np.ndarray | None = None
    roi_label_offset: int = 0  # ROI label = cell id + offset (label 0 is background)
    path: Path | None = None
    name: str = "session"
    notes: list = field(default_factory=list)
    timing: dict | None = None  # how measured frame times were matched (map2d assemble), for the report

    @property
    def cell_ids(self) -> np.ndarray:
        return self.responses.cell_ids


# ----------------------------------------------------------------------------------------------
# loading
# ----------------------------------------------------------------------------------------------
def _note(session_notes, message, stacklevel=3):
    session_notes.append(message)
    warnings.warn(message, InputWarning, stacklevel=stacklevel)


def _load_npy(folder: Path, rel: str, key: str, mmap: bool = False):
    path = folder / rel
    if not path.is_file():
        raise BadInput(path, key, "file not found")
    try:
        arr = np.load(path, mmap_mode="r" if mmap else None, allow_pickle=False)
    except Exception as exc:  # numpy raises several types for damaged files
        raise BadInput(path, key, f"not a readable .npy file ({type(exc).__name__})") from None
    if not isinstance(arr, np.ndarray):  # e.g. an .npz archive under an .npy name
        if hasattr(arr, "close"):
            arr.close()
        raise BadInput(path, key, "not a .npy file (holds an archive of several arrays)")
    # .npy has no checksum, but its header states the data size: a damaged header (shape, dtype)
    # that still parses shows up as a file of another length than header + data
    try:
        with open(path, "rb") as fh:
            major, _ = np.lib.format.read_magic(fh)
            read = np.lib.format.read_array_header_1_0 if major == 1 else np.lib.format.read_array_header_2_0
            read(fh)
            offset = fh.tell()
        extra = path.stat().st_size - offset - arr.nbytes
    except Exception as exc:
        raise BadInput(path, key, f"not a readable .npy file ({type(exc).__name__})") from None
    if extra != 0:
        raise BadInput(path, key, f"not a readable .npy file (its header describes {arr.nbytes} bytes of data, "
                                  f"the file holds {arr.nbytes + extra})")
    return arr


def _is_real(arr) -> bool:
    """True for integer, unsigned or floating arrays (not bool, complex, text, structured)."""
    return np.asarray(arr).dtype.kind in "iuf"


def _rel(spec, key, manifest_path, section) -> str:
    """A file name from the manifest section ``section``: present and a non-empty string."""
    if key not in spec:
        raise BadInput(manifest_path, f"{section}.{key}", "is missing")
    value = spec[key]
    if not isinstance(value, str) or not value.strip():
        raise BadInput(manifest_path, f"{section}.{key}", f"must be a file name, got {value!r}"[:200])
    longest = max(len(os.fsencode(part)) for part in Path(value).parts) if Path(value).parts else 0
    if "\x00" in value or longest > 255 or len(value) > 4096:
        raise BadInput(manifest_path, f"{section}.{key}", f"is not a usable file name ({len(value)} characters, "
                                                         f"a part of {longest} bytes; at most 255)")
    return value


def _section(manifest_path, spec, name, notes, known_as=None, known=None):
    """A manifest (or NWB mapping) section: must be a JSON object; unknown keys are reported and ignored.

    ``known`` maps section names to their keys (default: the session manifest's ``KNOWN_SUB_KEYS``)."""
    if not isinstance(spec, dict):
        raise BadInput(manifest_path, name, f"must be a JSON object, got {type(spec).__name__}")
    for key in sorted(set(spec) - (KNOWN_SUB_KEYS if known is None else known)[known_as or name]):
        _note(notes, f"{manifest_path}: unknown key '{name}.{key}' ignored")
    return spec


#: Largest array map2d reads from one ``.npz`` member (bytes), further limited by the memory free.
MAX_NPZ_MEMBER_BYTES = 16 * 2 ** 30
#: Largest ROI label image (pixels): 10000 x 10000, far above any imaging field of view.
MAX_ROI_PIXELS = 10 ** 8
#: Bytes read at a time when checking a member's CRC-32.
_CHUNK_BYTES = 2 ** 20


def _memory_available() -> int | None:
    """Bytes of memory the system can still give (``MemAvailable`` on Linux), None if unknown."""
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    return None


def _affordable(nbytes, path, key, what) -> None:
    """Refuse reading ``nbytes`` when above the member cap or 80 % of the memory available."""
    cap = MAX_NPZ_MEMBER_BYTES
    free = _memory_available()
    if free is not None:
        cap = min(cap, int(0.8 * free))
    if nbytes > cap:
        raise BadInput(path, key, f"{what} needs {nbytes / 2 ** 20:.0f} MiB; at most {cap / 2 ** 20:.0f} MiB can be "
                                  f"read here")


def _load_npz(folder: Path, rel: str, key: str, members=None, check_headers=None) -> dict:
    """The arrays of an ``.npz`` file (only ``members`` when given; others are never read).

    Reads are bounded before any decompression: each member's declared size must fit the limit
    (:func:`_affordable`) and agree with the shape and type its ``.npy`` header states, and
    ``check_headers({name: (shape, dtype)})`` may refuse the file from the headers alone; then each
    member's CRC-32 is checked in 1 MiB chunks, so damaged data never loads silently."""
    path = folder / rel
    if not path.is_file():
        raise BadInput(path, key, "file not found")
    try:
        with zipfile.ZipFile(path) as zf:
            infos = [i for i in zf.infolist() if i.filename.endswith(".npy")
                     and (members is None or i.filename[:-4] in members)]
            headers, layout = {}, {}
            for info in infos:
                name = info.filename[:-4]
                _affordable(info.file_size, path, name, "the array")
                with zf.open(info) as fh:
                    version = np.lib.format.read_magic(fh)
                    shape, fortran, dtype = (np.lib.format.read_array_header_1_0(fh) if version == (1, 0)
                                             else np.lib.format.read_array_header_2_0(fh))
                    if dtype.hasobject:
                        raise BadInput(path, name, "holds Python objects (not read: only plain arrays are)")
                    count = 1
                    for n in shape:
                        count *= int(n)
                    data = count * dtype.itemsize
                    if fh.tell() + data != info.file_size:
                        raise BadInput(path, name, f"not a readable .npz member (its header describes {data} "
                                                   f"bytes of data, the member holds {info.file_size - fh.tell()})")
                    layout[name] = (fh.tell(), fortran)
                headers[name] = (tuple(int(n) for n in shape), dtype)
            if check_headers is not None:
                check_headers(headers)
            out = {}
            for info in infos:
                name = info.filename[:-4]
                if info.compress_type == zipfile.ZIP_STORED:
                    # stored (np.savez): the array read in one go from where its bytes lie in the
                    # file, and the member's CRC-32 computed over them
                    out[name] = _read_stored(path, zf, info, headers[name], *layout[name])
                    continue
                with zf.open(info) as fh:
                    while fh.read(_CHUNK_BYTES):   # the CRC-32 is checked when the member ends
                        pass
        rest = [k for k in headers if k not in out]
        if rest:
            with np.load(path, allow_pickle=False) as z:
                out.update({k: z[k] for k in rest})
        return out
    except BadInput:
        raise
    except zipfile.BadZipFile as exc:
        detail = "fails its checksum" if "CRC" in str(exc) else f"({exc})"
        raise BadInput(path, key, f"not a readable .npz file {detail}"[:300]) from None
    except Exception as exc:
        raise BadInput(path, key, f"not a readable .npz file ({type(exc).__name__})") from None


def _read_stored(path, zf, info, header, start, fortran) -> np.ndarray:
    """The array of the stored (uncompressed) ``.npz`` member ``info`` whose ``.npy`` header ends at
    ``start`` bytes into the member; BadZipFile when its CRC-32 does not match."""
    import struct
    import zlib

    shape, dtype = header
    with open(path, "rb") as fh:
        fh.seek(info.header_offset)
        local = fh.read(30)                       # the member's local header: its name and extra field
        if len(local) != 30 or local[:4] != b"PK\x03\x04":
            raise zipfile.BadZipFile("bad local file header")
        n_name, n_extra = struct.unpack("<HH", local[26:30])
        fh.seek(info.header_offset + 30 + n_name + n_extra)
        crc = zlib.crc32(fh.read(start))
        count = 1
        for n in shape:
            count *= n
        arr = np.fromfile(fh, dtype=dtype, count=count)
    if arr.size != count:
        raise zipfile.BadZipFile("member is truncated")
    if zlib.crc32(arr.view(np.uint8), crc) != info.CRC:
        raise zipfile.BadZipFile(f"Bad CRC-32 for file {info.filename!r}")
    return arr.reshape(shape[::-1]).T if fortran else arr.reshape(shape)


def _require(mapping, key, where):
    if not isinstance(mapping, dict) or key not in mapping:
        raise BadInput(where, key, "is missing")
    return mapping[key]


def _pair(value, where, key, limit="position_deg"):
    """Two numbers (a JSON list) within ``LIMITS[limit]``."""
    if (not isinstance(value, (list, tuple)) or len(value) != 2
            or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value)):
        raise BadInput(where, key, "must be a list of two numbers")
    try:
        a, b = (float(v) for v in value)
    except (TypeError, ValueError, OverflowError):
        raise BadInput(where, key, "must be a list of two numbers") from None
    if not (math.isfinite(a) and math.isfinite(b)):
        raise BadInput(where, key, "must be finite")
    check_range([a, b], limit, where, key, first_row=None)
    return a, b


def _grid_place(grid_spec: dict, where) -> tuple[float, float, float, float]:
    """Centre x, y and spacing x, y (deg) from a ``sparse_noise.grid`` object of a manifest or mapping."""
    for key in ("center_deg", "spacing_deg"):
        if key not in grid_spec:
            raise BadInput(where, f"sparse_noise.grid.{key}", "is missing")
    cx, cy = _pair(grid_spec["center_deg"], where, "sparse_noise.grid.center_deg")
    try:
        dx, dy = (float(v) for v in grid_spec["spacing_deg"])
        if not (dx > 0 and dy > 0):
            raise BadInput(where, "sparse_noise.grid.spacing_deg", f"must be positive, got [{dx}, {dy}]")
    except (TypeError, ValueError, OverflowError):
        pass                                              # _pair names the defect
    dx, dy = _pair(grid_spec["spacing_deg"], where, "sparse_noise.grid.spacing_deg", "spacing_deg")
    return cx, cy, dx, dy


# ----------------------------------------------------------------------------------------------
# numbers and bounds: one strict parser for every text field, one table of physical limits
# ----------------------------------------------------------------------------------------------
_NUMBER = re.compile(r"[+-]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")
#: Longest number text accepted: a float64 needs 17 significant digits, a sign, a point and an exponent.
MAX_NUMBER_CHARS = 40

#: Bounds of every physical quantity and id map2d reads, ``name: (low, high, unit)``. They are far
#: outside any experiment, so that only wrong units, damaged values or hostile input meet them.
LIMITS = {
    "time_s": (-1e10, 1e10, "s"),             # a Unix-epoch clock reads 1.7e9 s
    "duration_s": (0.0, 86400.0, "s"),        # one presentation: at most a day
    "sf_cpd": (0.0, 100.0, "cycles/deg"),     # 0 = blank; no eye resolves 100 cycles/deg
    "sf_positive_cpd": (1e-4, 100.0, "cycles/deg"),   # a period above 10^4 deg is no grating
    "contrast": (0.0, 1.0, ""),               # Michelson contrast, a fraction (100 % is 1)
    "angle_deg": (-3600.0, 3600.0, "deg"),    # orientation, direction, phase: ten turns either way
    "tf_hz": (-1000.0, 1000.0, "Hz"),
    "position_deg": (-360.0, 360.0, "deg"),   # grid centre, phase origin (visual angle)
    "spacing_deg": (1e-4, 180.0, "deg"),
    "cell_id": (-(2.0 ** 53), 2.0 ** 53, ""),  # exact in float64 (CSV, JSON)
    "roi_label": (0, 2 ** 31 - 1, ""),
    "label_offset": (-(2 ** 31), 2 ** 31 - 1, ""),
    "display_cm": (1e-3, 1e5, "cm"),
    "display_px": (1, 1e6, "px"),
    "eye_cm": (-1e5, 1e5, "cm"),              # eye position relative to the screen centre
}


def parse_number(text) -> float:
    """The number in ``text``: plain decimal or exponent notation only (ASCII digits, an optional
    sign, point and exponent, at most :data:`MAX_NUMBER_CHARS` characters, surrounding blanks
    ignored). ``ValueError`` for anything else, e.g. underscores (``0_08``, which Python's ``float``
    reads as 8), digits of other scripts, ``nan``/``inf``, hexadecimal, or a value beyond float64.

    Examples
    --------
    >>> parse_number(" 0.08 "), parse_number("-1.5e-3"), parse_number("3")
    (0.08, -0.0015, 3.0)
    >>> parse_number("0_08")
    Traceback (most recent call last):
    ...
    ValueError: '0_08' is not a number (plain decimal or exponent notation, e.g. 0.08 or 8e-2)
    """
    s = str(text).strip()
    if len(s) > MAX_NUMBER_CHARS:
        raise ValueError(f"'{s[:12]}...' ({len(s)} characters) is not a number of at most "
                         f"{MAX_NUMBER_CHARS} characters")
    if not _NUMBER.fullmatch(s):
        raise ValueError(f"'{s}' is not a number (plain decimal or exponent notation, e.g. 0.08 or 8e-2)")
    v = float(s)
    if not math.isfinite(v) or (v == 0 and any(c in re.split("[eE]", s)[0] for c in "123456789")):
        raise ValueError(f"'{s}' is beyond the range of a 64-bit float")
    return v


def check_range(values, limit, file, field, first_row=0):
    """Refuse the first value of ``values`` outside ``LIMITS[limit]`` (or not a number), naming the
    value, the bound and its unit; for an array the row is its index + ``first_row`` (no row when
    ``first_row`` is None).

    Examples
    --------
    >>> check_range(0.5, "contrast", "g.csv", "contrast")
    >>> check_range([0.5, 100.0], "contrast", "g.csv", "contrast", first_row=1)
    Traceback (most recent call last):
    ...
    map2d.errors.BadInput: g.csv: field contrast, row 2: 100 is outside 0 to 1
    """
    lo, hi, unit = LIMITS[limit]
    a = np.asarray(values, dtype=np.float64)
    with np.errstate(invalid="ignore"):
        bad = ~((a >= lo) & (a <= hi))
    if not np.any(bad):
        return
    u = f" {unit}" if unit else ""
    r = int(np.flatnonzero(bad.reshape(-1))[0])
    raise BadInput(file, field, f"{a.reshape(-1)[r]:.6g}{u} is outside {lo:.6g} to {hi:.6g}{u}",
                   row=None if a.ndim == 0 or first_row is None else r + first_row)


# ----------------------------------------------------------------------------------------------
# validators on arrays: one set for the session folder and the NWB loader (map2d.nwb)
# ----------------------------------------------------------------------------------------------
# ``file`` and ``field`` are what an error names, BadInput(file, field, ...): the file and the array
# for a session folder, the .nwb file and the object's path inside it for NWB. ``where`` opens a note
# ("<file>: field traces", "<file.nwb>: processing/ophys/..."). Notes are warned with stacklevel 4:
# the loader's caller, as when the loaders warned themselves.
def _refuse_first(bad, file, field, detail, first_row=0) -> None:
    """Raise BadInput at the first True of the mask ``bad`` (its index + ``first_row`` is the row)."""
    rows = np.flatnonzero(bad)
    if rows.size:
        raise BadInput(file, field, detail, row=int(rows[0]) + first_row)


def _listed(values, most=5) -> str:
    """The first ``most`` integers of ``values`` as ``"3, 7, ..."`` for a note."""
    return ", ".join(str(int(v)) for v in values[:most]) + (", ..." if len(values) > most else "")


def check_times(times, file, field, expected=None) -> np.ndarray:
    """Validate onset or sample times: 1-D, numeric, non-empty, finite, strictly increasing.

    Parameters
    ----------
    times : array_like
        The times (s).
    file, field : str or Path
        What an error names.
    expected : int, optional
        Number of entries the times must have (one per frame or sample).

    Returns
    -------
    numpy.ndarray
        The times as float64.

    Raises
    ------
    BadInput
        Naming ``file``, ``field`` and the first bad entry (0-based row).

    Examples
    --------
    >>> check_times([0, 0.5, 1.0], "t.npy", "times")
    array([0. , 0.5, 1. ])
    >>> check_times([0.0, 0.5, 0.5], "t.npy", "times")
    Traceback (most recent call last):
    ...
    map2d.errors.BadInput: t.npy: field times, row 2: times are not strictly increasing
    """
    times = np.asarray(times)
    if times.ndim != 1:
        raise BadInput(file, field, f"must be one-dimensional, got shape {times.shape}")
    if not _is_real(times):
        raise BadInput(file, field, f"must be numeric, got {times.dtype}")
    times = times.astype(np.float64)
    if times.size == 0:
        raise BadInput(file, field, "is empty")
    if expected is not None and times.size != expected:
        raise BadInput(file, field, f"has {times.size} entries but {expected} were expected")
    _refuse_first(~np.isfinite(times), file, field, "is not finite")
    check_range(times, "time_s", file, field)
    _refuse_first(np.diff(times) <= 0, file, field, "times are not strictly increasing", first_row=1)
    return times


class StoredFrames:
    """Noise frames ``(frames, ny, nx)`` read a block at a time from a stored movie and converted on
    read (luminance to contrast, binary +-1 to float, NWB axis order), so a dense movie is streamed
    like a memory-mapped ``.npy`` file instead of being held in memory.

    Only what the engines use is provided: ``shape``, ``ndim``, ``dtype``, ``len``, slicing along the
    frames (``frames[a:b]`` gives an in-memory float32 array) and ``numpy.asarray`` (the whole movie).

    Parameters
    ----------
    read : callable
        ``read(a, b)`` -> frames ``a:b`` as an array ``(b - a, ny, nx)`` (the stored values, oriented).
    shape : tuple
        ``(frames, ny, nx)``.
    convert : callable, optional
        Applied to each block read (default: as float32).
    """

    ndim = 3

    def __init__(self, read, shape, convert=None):
        self._read = read
        self.shape = tuple(int(v) for v in shape)
        self.dtype = np.dtype(np.float32)
        self._convert = convert

    def __len__(self) -> int:
        return self.shape[0]

    def _block(self, a: int, b: int) -> np.ndarray:
        raw = np.asarray(self._read(a, b))
        out = raw if self._convert is None else self._convert(raw)
        return np.asarray(out, dtype=np.float32)

    def __getitem__(self, key):
        n = self.shape[0]
        if isinstance(key, (int, np.integer)):
            k = int(key) + (n if key < 0 else 0)
            if not 0 <= k < n:
                raise IndexError(f"frame {key} out of range for {n} frames")
            return self._block(k, k + 1)[0]
        if isinstance(key, slice):
            a, b, step = key.indices(n)
            if step == 1:
                return self._block(a, max(a, b))
            key = np.arange(a, b, step)
        idx = np.arange(n)[key]
        out = np.empty((idx.size,) + self.shape[1:], dtype=np.float32)
        for i, k in enumerate(idx):
            out[i] = self._block(int(k), int(k) + 1)[0]
        return out

    def __array__(self, dtype=None, copy=None):
        out = np.empty(self.shape, dtype=np.float32)
        step = _frames_per_chunk(self.shape)
        for a in range(0, self.shape[0], step):
            out[a:a + step] = self._block(a, min(self.shape[0], a + step))
        return out if dtype is None else out.astype(dtype, copy=False)


def _frames_per_chunk(shape) -> int:
    """Frames per block of about 16 M values."""
    return max(1, 2**24 // max(1, int(shape[1]) * int(shape[2])))


def _read_block(frames, a, b) -> np.ndarray:
    """Frames ``a:b`` in memory; the pages of a memory-mapped movie are released after the read."""
    blk = np.array(frames[a:b])
    mm = getattr(frames, "_mmap", None)
    if mm is not None and hasattr(mm, "madvise"):      # keep resident memory at one chunk
        import mmap
        try:
            mm.madvise(getattr(mmap, "MADV_DONTNEED", 4))
        except (OSError, ValueError):
            pass
    return blk


def _as_int8(frames, convert=None) -> np.ndarray:
    """Int8 frames in memory, read block by block (``convert`` applied to each block)."""
    out = np.empty(frames.shape, dtype=np.int8)
    step = _frames_per_chunk(frames.shape)
    for a in range(0, frames.shape[0], step):
        blk = _read_block(frames, a, a + step)
        out[a:a + step] = blk if convert is None else convert(blk)
    return out


def _stream(frames, convert):
    """``frames`` as :class:`StoredFrames` applying ``convert`` to every block read."""
    return StoredFrames(lambda a, b: _read_block(frames, a, b), frames.shape, convert)


def check_luminance(spec, where, key: str = "sparse_noise.luminance") -> tuple[float, float]:
    """The ``luminance`` entry of a manifest or mapping: ``{"background": B, "contrast_scale": S}``
    (contrast = (value - B) / S, S > 0), as ``(B, S)``; BadInput naming the key otherwise."""
    if not isinstance(spec, dict):
        raise BadInput(where, key, f"must be a JSON object with background and contrast_scale, got {spec!r}")
    unknown = sorted(set(spec) - {"background", "contrast_scale"})
    if unknown:
        raise BadInput(where, f"{key}.{unknown[0]}", "unknown key (known: background, contrast_scale)")
    values = []
    for k in ("background", "contrast_scale"):
        if k not in spec:
            raise BadInput(where, f"{key}.{k}", "is missing")
        v = spec[k]
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise BadInput(where, f"{key}.{k}", f"must be a finite number, got {v!r}")
        values.append(float(v))
    if values[1] <= 0:
        raise BadInput(where, f"{key}.contrast_scale", f"must be positive, got {values[1]:g}")
    return values[0], values[1]


def _levels(frames, file, field, most: int = 3):
    """Sorted distinct values of ``frames`` (read in blocks), or None once there are more than
    ``most``; non-finite values are refused."""
    seen: set = set()
    step = _frames_per_chunk(frames.shape)
    for a in range(0, frames.shape[0], step):
        blk = _read_block(frames, a, a + step)
        if blk.dtype.kind == "f":
            _refuse_first(~np.isfinite(blk).all(axis=(1, 2)), file, field, "is not finite", first_row=a)
        if blk.dtype.kind == "u" and blk.dtype.itemsize <= 2:
            seen.update(np.flatnonzero(np.bincount(blk.ravel())).tolist())
        else:
            seen.update(np.unique(blk).tolist())
        if len(seen) > most:
            return None
    return sorted(seen)


LUMINANCE_HINT = ("a luminance movie needs sparse_noise.luminance {\"background\": ..., \"contrast_scale\": ...}; "
                  "float frames are read as dense noise")


def check_frames(frames, file, field, luminance=None):
    """Validate noise frames ``(frames, ny, nx)`` and say which engine reads them.

    Two frames or more and a non-empty grid. Then, by what the frames hold:

    - integers -1, 0, +1 with some 0 (background): sparse noise, int8 in memory;
    - integers -1 and +1 only (binary dense noise): dense, streamed as float32;
    - finite reals: dense noise, as given (a memory-mapped movie stays on disk);
    - with ``luminance = (background, contrast_scale)``: stored luminance values (any integer or real
      type, e.g. uint8 0/127/255) are converted to contrast ``(value - background) / contrast_scale``.
      A movie of at most three levels, the background among them and at most one level on each side
      (dark / background / bright) is sparse noise (the sign of the contrast, int8); any other movie
      is dense noise, converted block by block as it is read.

    Values are checked in chunks of about 16 M, so a movie larger than memory stays on disk.

    Parameters
    ----------
    frames : numpy.ndarray or StoredFrames
        The frames, possibly memory-mapped (or any array-like sliced along the frames).
    file, field : str or Path
        What an error names.
    luminance : (float, float), optional
        Background level and contrast scale of a luminance movie (:func:`check_luminance`).

    Returns
    -------
    numpy.ndarray or StoredFrames
        Sparse noise as int8 in memory (the engines' sparse path); dense noise as a real array or
        :class:`StoredFrames` (the dense path).

    Raises
    ------
    BadInput
        Naming ``file``, ``field`` and the first bad frame (0-based row).

    Examples
    --------
    >>> lum = np.array([[[127, 255]], [[0, 127]]], dtype=np.uint8)
    >>> check_frames(lum, "f.npy", "frames", luminance=(127, 128))
    array([[[ 0,  1]],
    <BLANKLINE>
           [[-1,  0]]], dtype=int8)
    >>> check_frames(np.array([[[1, -1]], [[-1, 1]]], dtype=np.int8), "f.npy", "frames")[:].dtype
    dtype('float32')
    """
    if frames.ndim != 3:
        raise BadInput(file, field, f"must have shape (frames, ny, nx), got {frames.shape}")
    if frames.shape[0] < 2:
        raise BadInput(file, field, f"needs at least two frames, got {frames.shape[0]}")
    if frames.shape[1] < 1 or frames.shape[2] < 1:
        raise BadInput(file, field, f"the grid is empty: shape {frames.shape}")
    kind = frames.dtype.kind
    if luminance is not None:
        if kind not in "iuf":
            raise BadInput(file, field, f"must hold numbers (luminance), got {frames.dtype}")
        background, scale = luminance
        levels = _levels(frames, file, field)
        if (levels is not None and background in levels and sum(v < background for v in levels) <= 1
                and sum(v > background for v in levels) <= 1):
            return _as_int8(frames, lambda b: np.sign(b.astype(np.float64) - background))
        return _stream(frames, lambda b: (b.astype(np.float32) - np.float32(background)) / np.float32(scale))
    chunk = _frames_per_chunk(frames.shape)
    if kind in "iu":
        has_zero = False
        for a in range(0, frames.shape[0], chunk):
            blk = _read_block(frames, a, a + chunk)
            if blk.min() < -1 or blk.max() > 1:
                hint = f"values must be -1, 0 or +1 ({LUMINANCE_HINT})"
                _refuse_first(((blk < -1) | (blk > 1)).any(axis=(1, 2)), file, field, hint, first_row=a)
            has_zero = has_zero or not blk.all()
        if not has_zero:           # binary +-1 noise: every pixel bright or dark in every frame
            return _stream(frames, None)
        if isinstance(frames, np.ndarray) and not isinstance(frames, np.memmap):
            return frames.astype(np.int8, copy=False)
        return _as_int8(frames)                                   # small: read into memory
    if kind == "f":
        for a in range(0, frames.shape[0], chunk):
            finite = np.isfinite(_read_block(frames, a, a + chunk)).all(axis=(1, 2))
            _refuse_first(~finite, file, field, "is not finite", first_row=a)
        return frames if isinstance(frames, np.ndarray) else _stream(frames, None)
    raise BadInput(file, field, f"must be int8 (or float for dense noise), got {frames.dtype}")


def frame_gap_mask(times, exclude_gaps: bool, notes: list, where: str, setting: str = "in session.json"):
    """Note frames that span dropped frames (:func:`find_frame_gaps`); return ``SparseNoise.valid``.

    Parameters
    ----------
    times : numpy.ndarray
        Checked frame onsets (s).
    exclude_gaps : bool
        Leave those frames out (``sparse_noise.exclude_gaps``).
    notes : list
        Session notes; a note (and an :class:`InputWarning`) is added when there are gaps.
    where : str
        Opens the note.
    setting : str
        Where ``sparse_noise.exclude_gaps`` is set, for the note ("in session.json", "in the mapping").

    Returns
    -------
    numpy.ndarray or None
        None without ``exclude_gaps``; else a boolean mask, False at the frames before a gap.
    """
    gaps = find_frame_gaps(times)
    if gaps.size:
        med = float(np.median(np.diff(times)))
        what = ("those frames are excluded" if exclude_gaps else
                f"set sparse_noise.exclude_gaps to true {setting} to leave those frames out")
        _note(notes, f"{where}: {gaps.size} frame interval{'s are' if gaps.size > 1 else ' is'} longer than "
                     f"{GAP_FACTOR:g} x the median {med * 1e3:.4g} ms and look like dropped frames "
                     f"(after frame {_listed(gaps)}); {what}", stacklevel=4)
    if not exclude_gaps:
        return None
    valid = np.ones(times.size, dtype=bool)
    valid[gaps] = False
    return valid


def check_traces(values, times, notes: list, where: str, row_word: str = "row", ids=None) -> Traces:
    """Traces from shape-checked numeric values ``(cells, samples)`` and checked sample times.

    NaN or infinite samples are kept (left out of every average); a note counts them and names the
    first one and the first cell without any valid sample.

    Parameters
    ----------
    values : numpy.ndarray
        ``(cells, samples)``, any real dtype; converted to float32.
    times : numpy.ndarray
        Sample times from :func:`check_times`.
    notes : list
        Session notes.
    where : str
        Opens the note.
    row_word : str
        What a cell's index is called in the note ("row" for a file, "ROI" for an NWB series).
    ids : numpy.ndarray, optional
        Increasing cell ids of the rows (default: the row numbers).
    """
    values = values.astype(np.float32, copy=False)
    finite = np.isfinite(values)
    n_nan = int(values.size - np.count_nonzero(finite))
    name = np.arange(values.shape[0]) if ids is None else ids
    if n_nan:
        dead = np.flatnonzero(~finite.any(axis=1))
        more = (f"; {dead.size} cells have no valid sample at all (first {row_word} {int(name[dead[0]])}), their "
                f"results are empty" if dead.size else "")
        first = np.argwhere(~finite)[0]
        _note(notes, f"{where}: {n_nan} samples are NaN or infinite (first at {row_word} {int(name[first[0]])}, "
                     f"sample {int(first[1])}); they are left out of every average{more}", stacklevel=4)
    return Traces(values=values, times_s=times, ids=ids)


def check_spikes(time_s, cell, cell_ids, notes: list, where: str, unit: str = "cell") -> Spikes:
    """Spikes from checked float64 times and int64 cells: sorted by time (stable), silent cells noted.

    Parameters
    ----------
    time_s, cell : numpy.ndarray
        Finite spike times and the cell of each spike.
    cell_ids : numpy.ndarray or None
        Every cell, sorted and unique (cells without spikes included); None: the cells that spiked.
    notes : list
        Session notes; cells without spikes are noted (they are kept, with empty results).
    where : str
        Opens the note.
    unit : str
        What a cell is called in the note ("cell", or "unit" for an NWB units table).
    """
    if time_s.size > 1 and not np.all(time_s[1:] >= time_s[:-1]):     # most files are already sorted
        order = np.argsort(time_s, kind="stable")
        time_s, cell = time_s[order], cell[order]
    spikes = Spikes(time_s=time_s, cell=cell, cell_ids=cell_ids)
    silent = spikes.cell_ids[~np.isin(spikes.cell_ids, spikes.cell)]   # sorted, like setdiff1d
    if silent.size:
        _note(notes, f"{where}: {silent.size} of {spikes.cell_ids.size} {unit}s have no spikes "
                     f"({unit} {_listed(silent)}); they are kept, with empty results", stacklevel=4)
    return spikes


def check_grating_columns(data: dict, file, fields: dict | None = None, onset_name: str = "onset_s") -> None:
    """Refuse presentations that end before they start, negative SF or contrast, or a grating with
    contrast but no spatial frequency.

    Parameters
    ----------
    data : dict
        Finite float arrays for every name in ``GRATING_COLUMNS``.
    file : str or Path
        What an error names.
    fields : dict, optional
        The field an error names for ``offset_s``, ``sf_cpd`` and ``contrast`` (default: those names).
    onset_name : str
        What the onset column is called in the file ("must be later than ...").

    Raises
    ------
    BadInput
        At the first bad presentation (1-based data row).
    """
    fields = {c: c for c in GRATING_COLUMNS} | (fields or {})
    _refuse_first(data["offset_s"] <= data["onset_s"], file, fields["offset_s"],
                  f"must be later than {onset_name}", first_row=1)
    for c in ("sf_cpd", "contrast"):
        _refuse_first(data[c] < 0, file, fields[c], "must not be negative", first_row=1)
    _refuse_first((data["sf_cpd"] == 0) & (data["contrast"] != 0), file, fields["sf_cpd"],
                  "must be positive for a grating with contrast", first_row=1)
    for c, limit in (("onset_s", "time_s"), ("offset_s", "time_s"), ("sf_cpd", "sf_cpd"),
                     ("contrast", "contrast"), ("orientation_deg", "angle_deg"), ("phase_deg", "angle_deg"),
                     ("tf_hz", "tf_hz")):
        check_range(data[c], limit, file, fields.get(c, c), first_row=1)
    sf = data["sf_cpd"]
    check_range(np.where(sf > 0, sf, 1.0), "sf_positive_cpd", file, fields["sf_cpd"], first_row=1)
    check_range(data["offset_s"] - data["onset_s"], "duration_s", file, fields["offset_s"], first_row=1)


def find_frame_gaps(times_s, factor: float = GAP_FACTOR) -> np.ndarray:
    """Indices of frames whose interval to the next onset exceeds ``factor`` median intervals.

    Such a frame stayed on screen while frames were dropped (or the record of their onsets was
    lost). ``factor = 1.5`` is common practice: one dropped frame doubles an interval, while jitter
    of a few milliseconds stays far below it.

    Examples
    --------
    >>> find_frame_gaps([0.0, 0.1, 0.2, 0.4, 0.5, 0.6])
    array([2])
    """
    d = np.diff(np.asarray(times_s, dtype=np.float64))
    if d.size == 0:
        return np.zeros(0, dtype=np.int64)
    return np.flatnonzero(d > factor * np.median(d)).astype(np.int64)


def _load_sparse_noise(folder: Path, spec, notes) -> SparseNoise:
    mpath = folder / MANIFEST
    spec = _section(mpath, spec, "sparse_noise", notes)
    frames_rel = _rel(spec, "frames", mpath, "sparse_noise")
    times_rel = _rel(spec, "times", mpath, "sparse_noise")
    if "grid" not in spec:
        raise BadInput(mpath, "sparse_noise.grid", "is missing")
    cx, cy, dx, dy = _grid_place(_section(mpath, spec["grid"], "sparse_noise.grid", notes), mpath)
    exclude_gaps = spec.get("exclude_gaps", False)
    if not isinstance(exclude_gaps, bool):
        raise BadInput(mpath, "sparse_noise.exclude_gaps", f"must be true or false, got {exclude_gaps!r}")
    luminance = (check_luminance(spec["luminance"], mpath) if spec.get("luminance") is not None else None)
    frames = _load_npy(folder, frames_rel, "frames", mmap=True)  # memory-mapped: checked in chunks
    frames = check_frames(frames, folder / frames_rel, "frames", luminance=luminance)
    tpath = folder / times_rel
    times = check_times(_load_npy(folder, times_rel, "times"), tpath, "times", expected=frames.shape[0])
    grid = Grid(ny=frames.shape[1], nx=frames.shape[2], center_x_deg=cx, center_y_deg=cy, dx_deg=dx, dy_deg=dy)
    valid = frame_gap_mask(times, exclude_gaps, notes, f"{tpath}: field times", "in session.json")
    if spec.get("untimed") is not None:   # frames whose onset could not be measured (map2d assemble)
        rel = _rel(spec, "untimed", mpath, "sparse_noise")
        idx = _load_npy(folder, rel, "untimed")
        if idx.ndim != 1 or (idx.size and idx.dtype.kind not in "iu"):
            raise BadInput(folder / rel, "untimed", f"must be a 1-D array of frame indices, got {idx.dtype} "
                                                    f"{idx.shape}")
        _refuse_first((idx < 0) | (idx >= times.size), folder / rel, "untimed",
                      f"is not a frame index (0 to {times.size - 1})")
        valid = np.ones(times.size, dtype=bool) if valid is None else valid
        valid[np.asarray(idx, dtype=np.int64)] = False
    return SparseNoise(frames=frames, times_s=times, grid=grid, valid=valid)


def read_table(path) -> tuple[list[str], list[list[str]]]:
    """Read a CSV file into its header and rows of strings (no type conversion)."""
    path = Path(path)
    raw = path.read_bytes()
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = raw.count(b"\n", 0, exc.start)                 # 0 = header, k = data row k
        raise BadInput(path, None, f"is not UTF-8 text (byte {raw[exc.start]:#04x})", row=line) from None
    if "\x00" in text:
        line = text.count("\n", 0, text.index("\x00"))        # 0 = header, k = data row k
        raise BadInput(path, None, "is not a CSV text table (holds a NUL byte)", row=line)
    reader = csv.reader(io.StringIO(text))
    try:
        rows = [r for r in reader if r and any(c.strip() for c in r)]
    except csv.Error as exc:
        raise BadInput(path, None, f"is not a readable CSV table ({exc})", row=max(reader.line_num - 1, 0)) from None
    if not rows:
        raise BadInput(path, None, "is empty (a header row is required)")
    return [h.strip() for h in rows[0]], rows[1:]


def _load_gratings(folder: Path, spec, default_origin, notes) -> GratingTable:
    mpath = folder / MANIFEST
    spec = _section(mpath, spec, "gratings", notes)
    rel = _rel(spec, "table", mpath, "gratings")
    path = folder / rel
    if not path.is_file():
        raise BadInput(path, "table", "file not found")
    header, rows = read_table(path)
    missing = [c for c in GRATING_COLUMNS if c not in header]
    if missing:
        raise BadInput(path, missing[0], "column is missing from the header")
    if not rows:
        raise BadInput(path, None, "has a header but no presentations")
    twice = sorted({c for c in header if header.count(c) > 1})
    if twice:
        raise BadInput(path, twice[0], "column name appears more than once in the header")
    idx = {c: header.index(c) for c in header}
    data = {c: np.empty(len(rows)) for c in GRATING_COLUMNS}
    extra = {c: [] for c in header if c not in GRATING_COLUMNS}
    for r, row in enumerate(rows, start=1):
        if len(row) != len(header):
            raise BadInput(path, None, f"has {len(row)} fields, header has {len(header)}", row=r)
        for c in GRATING_COLUMNS:
            try:
                data[c][r - 1] = parse_number(row[idx[c]])
            except ValueError as exc:
                raise BadInput(path, c, str(exc), row=r) from None
        for c in extra:
            extra[c].append(row[idx[c]])
    check_grating_columns(data, path)
    # exact duplicates (every value equal, extra columns included): keep the first
    keys = np.column_stack([data[c] for c in GRATING_COLUMNS])
    seen: dict = {}
    dup = []
    for r in range(len(rows)):
        key = (keys[r].tobytes(), tuple(extra[c][r] for c in extra))
        if key in seen:
            dup.append(r)
        else:
            seen[key] = r
    if dup:
        keep = np.ones(len(rows), dtype=bool)
        keep[dup] = False
        _note(notes, f"{path}: {len(dup)} rows repeat an earlier row exactly (first at row {dup[0] + 1}, "
                     f"same as row {seen[(keys[dup[0]].tobytes(), tuple(extra[c][dup[0]] for c in extra))] + 1}); "
                     f"the repeats are dropped")
        data = {c: v[keep] for c, v in data.items()}
        extra = {c: [v for v, k in zip(vals, keep) if k] for c, vals in extra.items()}
    if "phase_origin_deg" in spec:
        origin = _pair(spec["phase_origin_deg"], mpath, "gratings.phase_origin_deg")
    else:
        origin = default_origin
    order = np.argsort(data["onset_s"], kind="stable")
    if np.any(order != np.arange(order.size)):
        _note(notes, f"{path}: rows are not in onset order; sorted by onset_s")
        data = {c: v[order] for c, v in data.items()}
        extra = {c: [v[i] for i in order] for c, v in extra.items()}
    if len(rows) > 1:
        overlap = np.flatnonzero(data["onset_s"][1:] < data["offset_s"][:-1] - 1e-9)
        if overlap.size:
            _note(notes, f"{path}: {overlap.size} presentations overlap the previous one "
                         f"(first at row {int(overlap[0]) + 2})")
    return GratingTable(**data, phase_origin_deg=origin, extra=extra)


def _load_responses(folder: Path, spec, notes) -> Spikes | Traces:
    mpath = folder / MANIFEST
    if not isinstance(spec, dict):
        raise BadInput(mpath, "responses", f"must be a JSON object, got {type(spec).__name__}")
    if "kind" not in spec:
        raise BadInput(mpath, "responses.kind", "is missing")
    kind = spec["kind"]
    if kind not in ("spikes", "traces"):
        raise BadInput(mpath, "responses.kind", f"must be 'spikes' or 'traces', got {kind!r}")
    spec = _section(mpath, spec, "responses", notes, known_as=f"responses.{kind}")
    rel = _rel(spec, "file", mpath, "responses")
    path = folder / rel
    if kind == "spikes":
        def spike_headers(h):                      # refused from the headers, before any data is read
            for key in ("time_s", "cell"):
                if key not in h:
                    raise BadInput(path, key, "array is missing")
                if len(h[key][0]) != 1:
                    raise BadInput(path, key, f"must be one-dimensional, got shape {h[key][0]}")
            if h["time_s"][0] != h["cell"][0]:
                raise BadInput(path, "cell", f"has {h['cell'][0][0]} entries but time_s has {h['time_s'][0][0]}")

        z = _load_npz(folder, rel, "file", members=("time_s", "cell"), check_headers=spike_headers)
        for key in ("time_s", "cell"):
            if key not in z:
                raise BadInput(path, key, "array is missing")
        t, c = np.asarray(z["time_s"]), np.asarray(z["cell"])
        for key, a in (("time_s", t), ("cell", c)):
            if a.ndim != 1:
                raise BadInput(path, key, f"must be one-dimensional, got shape {a.shape}")
        if t.size != c.size:
            raise BadInput(path, "cell", f"has {c.size} entries but time_s has {t.size}")
        if not _is_real(t):
            raise BadInput(path, "time_s", f"must be numeric, got {t.dtype}")
        t = t.astype(np.float64, copy=False)
        _refuse_first(~np.isfinite(t), path, "time_s", "is not finite")
        check_range(t, "time_s", path, "time_s")
        if c.dtype.kind == "f":
            _refuse_first(~np.isfinite(c) | (c != np.round(c)) | (np.abs(c) > 2.0**53), path, "cell",
                          "must hold integers")
        elif c.dtype.kind == "u" and c.size and c.max() > np.iinfo(np.int64).max:
            raise BadInput(path, "cell", "holds an id too large for a 64-bit integer")
        elif c.dtype.kind not in "iu":
            raise BadInput(path, "cell", f"must hold integers, got {c.dtype}")
        c = c.astype(np.int64, copy=False)
        check_range(c, "cell_id", path, "cell")
        ids = None
        if "cell_ids" in spec:
            raw = spec["cell_ids"]
            try:
                if not isinstance(raw, list) or not all(isinstance(v, int) and not isinstance(v, bool)
                                                        for v in raw):
                    raise TypeError
                ids = np.asarray(raw, dtype=np.int64).reshape(-1)
            except (TypeError, ValueError, OverflowError):
                raise BadInput(mpath, "responses.cell_ids", "must be a list of integers") from None
            check_range(ids, "cell_id", mpath, "responses.cell_ids")
            unknown = np.setdiff1d(c, ids)
            if unknown.size:
                raise BadInput(path, "cell", f"cell {int(unknown[0])} is not in responses.cell_ids")
            ids = np.unique(ids)
        spikes = check_spikes(t, c, ids, notes, f"{path}: field cell")
        if spikes.cell_ids.size == 0:
            raise BadInput(path, "time_s", "holds no spikes and responses.cell_ids names no cells: "
                                           "there is no cell to analyze")
        return spikes
    values = _load_npy(folder, rel, "file")
    if values.ndim != 2:
        raise BadInput(path, "traces", f"must have shape (cells, samples), got {values.shape}")
    if not _is_real(values):
        raise BadInput(path, "traces", f"must be numeric, got {values.dtype}")
    if values.shape[0] == 0:
        raise BadInput(path, "traces", f"has no cells (shape {values.shape})")
    if values.shape[1] < 2:
        raise BadInput(path, "traces", f"needs at least two samples, got {values.shape[1]}")
    times_rel = _rel(spec, "times", mpath, "responses")
    times = check_times(_load_npy(folder, times_rel, "times"), folder / times_rel, "times",
                        expected=values.shape[1])
    ids = None
    if spec.get("cell_ids") is not None:    # the ids of the rows (e.g. ROI ids); default the row numbers
        raw = spec["cell_ids"]
        if not (isinstance(raw, list) and all(isinstance(v, int) and not isinstance(v, bool) for v in raw)):
            raise BadInput(mpath, "responses.cell_ids", "must be a list of integers, one per row of traces")
        if len(raw) != values.shape[0]:
            raise BadInput(mpath, "responses.cell_ids", f"has {len(raw)} ids for {values.shape[0]} rows of traces")
        ids = np.asarray(raw, dtype=np.int64)
        if np.any(np.diff(ids) <= 0):
            raise BadInput(mpath, "responses.cell_ids", "must be increasing (one id per row, rows in id order)")
    return check_traces(values, times, notes, f"{path}: field traces", ids=ids)


def _stimulus_windows(session: "Session") -> tuple[np.ndarray, np.ndarray]:
    """Starts and ends of every stimulus window (valid sparse-noise frames, grating presentations)."""
    starts, ends = [np.zeros(0)], [np.zeros(0)]
    sn = session.sparse_noise
    if sn is not None:
        keep = slice(None) if sn.valid is None else np.asarray(sn.valid, dtype=bool)
        starts.append(sn.times_s[keep])
        ends.append(sn.frame_ends_s()[keep])
    if session.gratings is not None and len(session.gratings):
        starts.append(session.gratings.onset_s)
        ends.append(session.gratings.offset_s)
    return np.concatenate(starts), np.concatenate(ends)


def count_spikes_outside(session: "Session") -> int:
    """Number of spikes outside every stimulus window (sparse-noise frames, grating presentations).

    A sparse-noise frame lasts from its onset to the next (the last one a median interval); frames
    marked invalid (``SparseNoise.valid``) are not windows. A grating presentation lasts from
    ``onset_s`` to ``offset_s``. Such spikes are ignored by every analysis. Returns 0 for traces or a
    session without stimuli.
    """
    r = session.responses
    if not isinstance(r, Spikes) or r.time_s.size == 0:
        return 0
    starts, ends = _stimulus_windows(session)
    if starts.size == 0:
        return 0
    order = np.argsort(starts, kind="stable")
    starts, reach = starts[order], np.maximum.accumulate(ends[order])
    t = r.time_s
    if np.all(t[1:] >= t[:-1]):
        # sorted spikes (as loaded): a spike is inside when it lies in the union of the windows, runs
        # of overlapping or touching windows [start of the run, its reach); count per run
        first = np.flatnonzero(np.concatenate([[True], starts[1:] >= reach[:-1]]))
        last = np.append(first[1:], starts.size) - 1
        n_in = np.searchsorted(t, reach[last], side="left") - np.searchsorted(t, starts[first], side="left")
        return int(t.size - np.maximum(n_in, 0).sum())
    k = np.searchsorted(starts, t, side="right") - 1
    inside = k >= 0
    inside[inside] = reach[k[inside]] > t[inside]
    return int(t.size - np.count_nonzero(inside))


def _read_json_object(path, missing: str = "file not found") -> dict:
    """A JSON file holding an object (a manifest or a mapping); BadInput naming the file otherwise."""
    path = Path(path)
    if not path.is_file():
        raise BadInput(path, None, missing)
    size = path.stat().st_size
    if size > MAX_JSON_BYTES:
        raise BadInput(path, None, f"is {size} bytes; a manifest or mapping has at most {MAX_JSON_BYTES}")
    try:
        with open(path, "rb") as fh:
            raw = fh.read(MAX_JSON_BYTES + 1)
        if len(raw) > MAX_JSON_BYTES:
            raise BadInput(path, None, f"is larger than {MAX_JSON_BYTES} bytes")
        text = raw.decode("utf-8")
        depth = _json_depth(text)
        if depth > MAX_JSON_DEPTH:
            raise BadInput(path, None, f"nests {depth} levels deep; at most {MAX_JSON_DEPTH} are accepted")
        value = json.loads(text, parse_float=_json_number, parse_int=_json_number,
                           parse_constant=_json_constant)
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise BadInput(path, None, f"is not valid JSON ({exc})") from None
    except ValueError as exc:                               # from _json_number / _json_constant
        raise BadInput(path, None, f"holds an unreadable number: {exc}") from None
    except RecursionError:
        raise BadInput(path, None, "nests too deeply") from None
    if not isinstance(value, dict):
        raise BadInput(path, None, "must hold a JSON object")
    return value


#: Largest manifest or mapping (JSON) read; a session.json with a million cell ids is ~8 MB.
MAX_JSON_BYTES = 64 * 2 ** 20
#: Deepest nesting of JSON arrays and objects accepted (a manifest needs 3).
MAX_JSON_DEPTH = 32


def _json_depth(text: str) -> int:
    """Deepest nesting of ``[``/``{`` outside strings in the JSON ``text`` (no recursion)."""
    depth = deepest = 0
    in_str = False
    for ch in re.findall(r'\\.|[\[\]{}"]', text, re.S):
        if ch[0] == "\\":                         # an escape sequence (inside a string)
            continue
        if in_str:
            if ch == '"':
                in_str = False
        elif ch == '"':
            in_str = True
        elif ch in "[{":
            depth += 1
            deepest = max(deepest, depth)
        elif ch in "]}":
            depth -= 1
    return deepest


def _json_number(text: str):
    """A JSON number: an int when written as one, else a float; refused beyond :data:`MAX_NUMBER_CHARS`
    characters or the float64 range."""
    if len(text) > MAX_NUMBER_CHARS:
        raise ValueError(f"'{text[:12]}...' has {len(text)} characters (at most {MAX_NUMBER_CHARS})")
    if re.fullmatch(r"-?[0-9]+", text):
        return int(text)
    return parse_number(text)


def _json_constant(name: str):
    raise ValueError(f"{name} is not a number JSON allows")


def _load_stimuli(folder: Path, manifest: dict, notes: list):
    """The manifest's sparse noise and gratings (None where absent); the phase origin defaults to the
    sparse-noise grid centre, else (0, 0)."""
    sparse = None
    if manifest.get("sparse_noise") is not None:
        sparse = _load_sparse_noise(folder, manifest["sparse_noise"], notes)
    gratings = None
    if manifest.get("gratings") is not None:
        default_origin = ((sparse.grid.center_x_deg, sparse.grid.center_y_deg) if sparse is not None
                          else (0.0, 0.0))
        gratings = _load_gratings(folder, manifest["gratings"], default_origin, notes)
    return sparse, gratings


def load_session(folder) -> Session:
    """Load and validate a session folder.

    Parameters
    ----------
    folder : str or Path
        Folder holding ``session.json`` and the files it names.

    Returns
    -------
    Session

    Raises
    ------
    BadInput
        With a message naming the file, the field and (where it applies) the row.
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise BadInput(folder, None, "session folder not found")
    mpath = folder / MANIFEST
    manifest = _read_json_object(mpath)
    notes: list = []
    for key in sorted(set(manifest) - KNOWN_TOP_KEYS):
        _note(notes, f"{mpath}: unknown key '{key}' ignored")
    if manifest.get("responses") is None:
        raise BadInput(mpath, "responses", "is missing (every session needs responses)")
    responses = _load_responses(folder, manifest["responses"], notes)
    sparse, gratings = _load_stimuli(folder, manifest, notes)
    display = None
    if manifest.get("display") is not None:
        d = manifest["display"]
        try:
            eye = d.get("eye_cm", [0.0, 0.0])
            for key, limit in (("width_cm", "display_cm"), ("height_cm", "display_cm"),
                               ("distance_cm", "display_cm"), ("width_px", "display_px"),
                               ("height_px", "display_px")):
                v = d[key]
                if isinstance(v, bool) or not isinstance(v, (int, float)):     # not "52" nor true
                    raise BadInput(mpath, f"display.{key}", f"must be a number, got {v!r}"[:120])
                if key.endswith("_px") and v != int(v):
                    raise BadInput(mpath, f"display.{key}", f"must be whole pixels, got {v!r}")
                check_range(float(v), limit, mpath, f"display.{key}")
            eye = _pair(eye, mpath, "display.eye_cm", "eye_cm")
            display = Display(width_cm=float(d["width_cm"]), height_cm=float(d["height_cm"]),
                              width_px=int(d["width_px"]), height_px=int(d["height_px"]),
                              distance_cm=float(d["distance_cm"]), eye_x_cm=float(eye[0]), eye_y_cm=float(eye[1]))
        except BadInput:
            raise
        except (KeyError, TypeError, ValueError, IndexError, AttributeError, OverflowError) as exc:
            raise BadInput(mpath, "display", f"is incomplete or invalid ({exc})") from None
    rois = None
    roi_offset = 0
    if manifest.get("rois") is not None:
        spec = manifest["rois"]
        if isinstance(spec, dict):
            for key in sorted(set(spec) - {"file", "label_offset"}):
                _note(notes, f"{mpath}: unknown key 'rois.{key}' ignored")
            rel = spec.get("file")
            off = spec.get("label_offset", 0)
            if isinstance(off, bool) or not isinstance(off, int):
                raise BadInput(mpath, "rois.label_offset", f"must be an integer, got {off!r}")
            check_range(off, "label_offset", mpath, "rois.label_offset")
            roi_offset = int(off)
        else:
            rel = spec
        if not isinstance(rel, str) or not rel.strip():
            raise BadInput(mpath, "rois", f"must be a file name or {{\"file\": ..., \"label_offset\": n}}, "
                                          f"got {spec!r}")
        rois = _load_rois(folder, rel)
    session = Session(responses=responses, sparse_noise=sparse, gratings=gratings, display=display,
                      rois=rois, roi_label_offset=roi_offset, path=folder,
                      name=_session_name(manifest, folder, mpath), notes=notes,
                      timing=manifest["timing"] if isinstance(manifest.get("timing"), dict) else None)
    spec = manifest["responses"]
    spike_file = folder / spec["file"]
    at = (spike_file, "time_s") if isinstance(responses, Spikes) else (folder / spec["times"], "times")
    check_overlap(session, at, notes, f"{spike_file}: field time_s")
    return session


#: Longest session name accepted (it names folders and report titles).
MAX_NAME_CHARS = 200


def _session_name(manifest: dict, folder: Path, mpath) -> str:
    """The manifest's ``name`` (text of at most :data:`MAX_NAME_CHARS` characters), else the folder's
    name, with bytes that are not UTF-8 (a folder named in another encoding) shown as U+FFFD."""
    if manifest.get("name") is not None:
        name = manifest["name"]
        if not isinstance(name, str) or not name.strip():
            raise BadInput(mpath, "name", f"must be a non-empty text, got {name!r}"[:120])
        if len(name) > MAX_NAME_CHARS:
            raise BadInput(mpath, "name", f"has {len(name)} characters; at most {MAX_NAME_CHARS}")
        return name
    return os.fsencode(Path(os.path.abspath(folder)).name).decode("utf-8", "replace")[:MAX_NAME_CHARS]


#: The units guard (:func:`check_overlap`): responses are refused when fewer than this share of them
#: fall within the stimulus span while their own span is more than ``_SPAN_RATIO`` times longer (and
#: spikes fire below ``_LOW_RATE_HZ`` per cell there, or traces are sampled slower than ``_SLOW_DT_S``),
#: or when a recording at least half as long as the stimulus span covers less than ``_MIN_COVER`` of it
#: (a displaced clock; a short recording is not one). Ours: a recording in milliseconds
#: gives 0.1 % inside, a ratio of 1000 and rates 1000 times too low; one long recording with a short
#: mapping block (hours around 10 minutes) stays well above these.
_MIN_INSIDE, _SPAN_RATIO, _LOW_RATE_HZ, _SLOW_DT_S, _MIN_COVER = 0.01, 100.0, 0.1, 1.0, 0.1


def _scale_word(ratio: float, whose: str) -> str | None:
    """'<whose> times in milliseconds' when ``ratio`` (response span / stimulus span) is near a power of
    1000, else None."""
    for factor, unit in ((1e3, "milliseconds"), (1e6, "microseconds"), (1e9, "nanoseconds")):
        if factor / 5 <= ratio <= factor * 5:
            return f"{whose} times in {unit}? (map2d needs seconds)"
        if factor / 5 <= 1 / ratio <= factor * 5:
            return f"stimulus times in {unit}? (map2d needs seconds on the recording's clock)"
    return None


def _clock_cause(t0, t1, lo, hi, whose) -> str:
    """The likely cause of responses and stimuli that do not line up: units, else a clock offset."""
    span_r, span_s = max(t1 - t0, 1e-12), max(hi - lo, 1e-12)
    units = _scale_word(span_r / span_s, whose)
    if units:
        return units
    off = lo - t0
    hours = f" ({off / 3600:.3g} h)" if abs(off) >= 3600 else ""
    return (f"the stimulus times and the recording seem to use different clocks, offset by about {off:.6g} s"
            f"{hours}: convert the stimulus times to the recording's clock (map2d assemble does this with "
            f"measured frame times)")


def _timing_problem(r, lo, hi) -> str | None:
    """Why responses cannot be analyzed against stimuli spanning ``lo``-``hi`` s, or None."""
    spikes = isinstance(r, Spikes)
    t = r.time_s if spikes else r.times_s
    if t.size < 2:
        return None
    t0, t1 = float(np.min(t)), float(np.max(t))
    whose = "spike" if spikes else "sample"
    span_s = hi - lo
    if not span_s > 0:
        return None
    inside = float(np.count_nonzero((t >= lo) & (t <= hi))) / t.size
    ratio = (t1 - t0) / span_s
    if spikes:
        n_cells = max(int(np.size(r.cell_ids)), 1)
        implausible = inside * t.size / (n_cells * span_s) < _LOW_RATE_HZ
        what = f"{inside * t.size / (n_cells * span_s):.3g} spikes/s per cell"
    else:
        dt = float(np.median(np.diff(t)))
        implausible = dt > _SLOW_DT_S
        what = f"one sample every {dt:.3g} s"
    if inside < _MIN_INSIDE and ratio > _SPAN_RATIO and implausible:
        cause = _scale_word(ratio, whose) or f"{whose} times in another unit than seconds?"
        return (f"the {whose} times ({t0:.6g} to {t1:.6g}) span {ratio:.3g} times the stimulus span ({lo:.6g} to "
                f"{hi:.6g} s), only {100 * inside:.2g} % of them fall within it, at {what}: {cause}")
    cover = max(0.0, min(t1, hi) - max(t0, lo)) / span_s
    if cover < _MIN_COVER and (t1 - t0) >= 0.5 * span_s and (not spikes or t.size >= 20):
        return (f"the {whose} times ({t0:.6g} to {t1:.6g} s) cover only {100 * cover:.2g} % of the stimulus span "
                f"({lo:.6g} to {hi:.6g} s): {_clock_cause(t0, t1, lo, hi, whose)}")
    return None


def check_overlap(session: Session, at, notes: list, where: str) -> None:
    """Refuse responses that share no time with the stimuli, or only a sliver of it (the units guard:
    times in milliseconds, or stimuli on another clock: every analysis would come out empty), naming
    the likely cause; note spikes that fall outside every stimulus window.

    Parameters
    ----------
    session : Session
        The loaded session.
    at : (file, field)
        What an error names: the spike times, or the traces' sample times.
    notes : list
        Session notes.
    where : str
        Opens the note on spikes outside every window.
    """
    n_out = count_spikes_outside(session)
    starts, ends = _stimulus_windows(session)
    r = session.responses
    if starts.size:
        lo, hi = float(starts.min()), float(ends.max())
        if isinstance(r, Spikes):
            if r.time_s.size and n_out == r.time_s.size:
                t0, t1 = float(r.time_s.min()), float(r.time_s.max())
                raise BadInput(*at, f"no spike falls in any stimulus window (spikes {t0:.6g} to "
                                    f"{t1:.6g} s, stimuli {lo:.6g} to {hi:.6g} s): check time units "
                                    f"and clock; likely cause: {_clock_cause(t0, t1, lo, hi, 'spike')}")
        else:
            t = r.times_s
            if not np.any((starts < t[-1]) & (ends > t[0])):
                raise BadInput(*at, f"the samples ({t[0]:.6g} to {t[-1]:.6g} s) overlap no stimulus window "
                                    f"({lo:.6g} to {hi:.6g} s): check time units and clock; likely cause: "
                                    f"{_clock_cause(float(t[0]), float(t[-1]), lo, hi, 'sample')}")
        problem = _timing_problem(r, lo, hi)
        if problem:
            raise BadInput(*at, problem)
    if n_out:
        _note(notes, f"{where}: {n_out} of {r.time_s.size} spikes fall outside every stimulus window "
                     f"(sparse-noise frames, grating presentations); they are ignored", stacklevel=4)


def _load_rois(folder: Path, rel) -> np.ndarray:
    path = folder / str(rel)
    if not path.is_file():
        raise BadInput(path, "rois", "file not found")
    try:
        import tifffile
        with tifffile.TiffFile(path) as tif:      # dimensions checked before anything is decoded
            series = tif.series[0]
            shape, dtype = tuple(int(n) for n in series.shape), np.dtype(series.dtype)
            pixels = 1
            for n in shape:
                pixels *= n
            if pixels > MAX_ROI_PIXELS:
                raise BadInput(path, "rois", f"holds {' x '.join(map(str, shape))} pixels; a label image has at "
                                             f"most {MAX_ROI_PIXELS}")
            _affordable(pixels * dtype.itemsize, path, "rois", "the label image")
            labels = series.asarray()
    except BadInput:
        raise
    except Exception as exc:
        raise BadInput(path, "rois", f"not a readable TIFF ({type(exc).__name__})") from None
    labels = np.squeeze(labels)
    if labels.ndim != 2 or not np.issubdtype(labels.dtype, np.integer):
        raise BadInput(path, "rois", f"must be a 2-D integer label image, got {labels.dtype} {labels.shape}")
    if labels.size:
        lo, hi = LIMITS["roi_label"][:2]
        bad = (labels < lo) | (labels > hi)
        if np.any(bad):
            i, j = (int(v) for v in np.argwhere(bad)[0])
            raise BadInput(path, "rois", f"label {int(labels[i, j])} at pixel ({i}, {j}) is outside {lo} to {hi} "
                                         f"(0 = no cell)")
    return labels


# ----------------------------------------------------------------------------------------------
# writing
# ----------------------------------------------------------------------------------------------
def _fmt(v) -> str:
    if v is None:
        return ""
    if isinstance(v, (bool, np.bool_)):
        return "true" if v else "false"
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if isinstance(v, (float, np.floating)):
        return "" if not math.isfinite(float(v)) else format(float(v), ".7g")
    return str(v)


def write_table(path, columns: dict) -> None:
    """Write columns (equal-length sequences) as CSV: booleans true/false, NaN/None empty."""
    names = list(columns)
    n = {len(columns[c]) for c in names}
    if len(n) > 1:
        raise ValueError(f"columns have unequal lengths: { {c: len(columns[c]) for c in names} }")
    nrows = n.pop() if n else 0
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(names)
        for i in range(nrows):
            w.writerow([_fmt(columns[c][i]) for c in names])


def _save_npz(path, **arrays) -> None:
    """Like ``np.savez`` but with a fixed member timestamp, so equal arrays give byte-identical files."""
    import zipfile
    with zipfile.ZipFile(path, "w", zipfile.ZIP_STORED) as zf:
        for name, arr in arrays.items():
            info = zipfile.ZipInfo(name + ".npy", date_time=(1980, 1, 1, 0, 0, 0))
            with zf.open(info, "w", force_zip64=True) as fh:
                np.lib.format.write_array(fh, np.asarray(arr), allow_pickle=False)


def write_session(folder, session: Session, overwrite: bool = False) -> Path:
    """Write a session folder following the contract. Returns the folder path."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    if not overwrite and (folder / MANIFEST).exists():
        raise BadInput(folder, None, "already holds a session (use overwrite)")
    manifest: dict = {"name": session.name}
    if session.sparse_noise is not None:
        manifest["sparse_noise"] = _write_sparse_noise(folder, session.sparse_noise)
    if session.gratings is not None:
        manifest["gratings"] = _write_gratings(folder, session.gratings)
    r = session.responses
    if isinstance(r, Spikes):
        _save_npz(folder / "spikes.npz", time_s=np.asarray(r.time_s, np.float64), cell=np.asarray(r.cell, np.int64))
        manifest["responses"] = {"kind": "spikes", "file": "spikes.npz"}
        if not np.array_equal(np.unique(r.cell), r.cell_ids):
            manifest["responses"]["cell_ids"] = [int(c) for c in r.cell_ids]
    else:
        np.save(folder / "traces.npy", np.asarray(r.values, dtype=np.float32))
        np.save(folder / "trace_times.npy", np.asarray(r.times_s, dtype=np.float64))
        manifest["responses"] = {"kind": "traces", "file": "traces.npy", "times": "trace_times.npy"}
        if r.ids is not None:
            manifest["responses"]["cell_ids"] = [int(c) for c in r.ids]
    if session.display is not None:
        manifest["display"] = session.display.to_manifest()
    if session.rois is not None:
        import tifffile
        tifffile.imwrite(folder / "rois.tif", np.asarray(session.rois, dtype=np.int32))
        manifest["rois"] = ("rois.tif" if not session.roi_label_offset
                            else {"file": "rois.tif", "label_offset": int(session.roi_label_offset)})
    tmp = folder / (MANIFEST + ".tmp")
    tmp.write_text(json.dumps(manifest, indent=2) + "\n", encoding="utf-8")
    os.replace(tmp, folder / MANIFEST)
    return folder


# ----------------------------------------------------------------------------------------------
# stimulus folders (output of ``map2d stimulus``)
# ----------------------------------------------------------------------------------------------
STIMULUS_MANIFEST = "stimulus.json"


def _fmt_exact(v: float) -> str:
    """A float as the shortest text that reads back exactly (integers without ``.0``, NaN empty)."""
    if not math.isfinite(v):
        return ""
    if v.is_integer() and abs(v) < 1e15:
        return str(int(v))
    return repr(float(v))


def _write_sparse_noise(folder: Path, sn: SparseNoise) -> dict:
    """Write ``sparse_noise.npy`` and ``sparse_noise_times.npy``; return the manifest entry."""
    np.save(folder / "sparse_noise.npy", sn.frames)
    np.save(folder / "sparse_noise_times.npy", np.asarray(sn.times_s, dtype=np.float64))
    entry = {"frames": "sparse_noise.npy", "times": "sparse_noise_times.npy", "grid": sn.grid.to_manifest()}
    if sn.valid is not None:
        # only the gap rule is stored: the loader recomputes the mask from the frame times
        entry["exclude_gaps"] = True
    return entry


def _write_gratings(folder: Path, g: GratingTable) -> dict:
    """Write ``gratings.csv``; return the manifest entry."""
    # shortest text that reads back to the same float64 (times such as k / 60 keep every digit)
    cols = {c: [_fmt_exact(v) for v in np.asarray(getattr(g, c), dtype=float)] for c in GRATING_COLUMNS}
    cols.update(g.extra)
    write_table(folder / "gratings.csv", cols)
    return {"table": "gratings.csv", "phase_origin_deg": list(map(float, g.phase_origin_deg))}


def write_stimulus(folder, sparse_noise: SparseNoise | None = None, gratings: GratingTable | None = None,
                   display: Display | None = None, info: dict | None = None) -> Path:
    """Write stimulus files for presentation, the same files a session folder uses.

    Parameters
    ----------
    folder : str or Path
        Existing or new folder. Files of the same names are replaced.
    sparse_noise : SparseNoise, optional
        Written as ``sparse_noise.npy`` (int8 frames) and ``sparse_noise_times.npy`` (float64 onsets).
    gratings : GratingTable, optional
        Written as ``gratings.csv`` (contract columns, then any extra columns).
    display : Display, optional
        Screen geometry used for rendering, stored under ``display`` (the session manifest's key).
    info : dict, optional
        JSON-serialisable description of how the stimulus was made (generator, arguments, seed,
        rendered frames), stored under ``generator``.

    Returns
    -------
    Path
        The folder.

    Notes
    -----
    ``stimulus.json`` has the layout of a session's ``session.json`` without ``responses``:
    ``sparse_noise`` (frames, times, grid), ``gratings`` (table, phase_origin_deg), optionally
    ``display`` and ``generator``. Adding a ``responses`` entry (and renaming it ``session.json``)
    turns the folder into a session, so what was shown and what is analyzed are the same files.
    """
    if sparse_noise is None and gratings is None:
        raise ValueError("write_stimulus: give sparse_noise or gratings (or both)")
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    manifest: dict = {}
    if sparse_noise is not None:
        manifest["sparse_noise"] = _write_sparse_noise(folder, sparse_noise)
    if gratings is not None:
        manifest["gratings"] = _write_gratings(folder, gratings)
    if display is not None:
        manifest["display"] = display.to_manifest()
    if info is not None:
        manifest["generator"] = info
    tmp = folder / (STIMULUS_MANIFEST + ".tmp")
    tmp.write_text(json.dumps(manifest, indent=2) + "\n", encoding="utf-8")
    os.replace(tmp, folder / STIMULUS_MANIFEST)
    return folder


def _span_overlap(a0, a1, onsets, offsets):
    """Index of the first interval ``[onsets, offsets)`` that overlaps ``[a0, a1)``, or None."""
    hit = np.flatnonzero((np.asarray(onsets) < a1) & (np.asarray(offsets) > a0))
    return int(hit[0]) if hit.size else None


def add_stimulus(folder, sparse_noise: SparseNoise | None = None, gratings: GratingTable | None = None,
                 display: Display | None = None, info: dict | None = None, overwrite: bool = False,
                 files: dict | None = None) -> list:
    """Add a stimulus block to a folder, so that several ``map2d stimulus`` calls build one protocol.

    Sparse noise is written as ``sparse_noise.npy`` and ``sparse_noise_times.npy``; an existing one is
    refused unless ``overwrite``. Gratings are appended to ``gratings.csv`` (same phase origin, no
    overlap in time with what is there), or replace it with ``overwrite``. A block that overlaps
    another in time is refused. ``stimulus.json`` and the stimulus part of ``session.json`` (its
    ``sparse_noise``, ``gratings``, ``display`` and ``generator`` keys; others are kept) are rewritten;
    ``generator`` lists the calls in order. ``files`` maps further file names (e.g. rendered frames)
    to functions ``write(path)``; an existing one is refused unless ``overwrite``. Every check comes
    before any write; the files are written in place (``map2d stimulus`` runs this on a copy of
    ``--out`` that replaces it atomically, :func:`map2d.pipeline.results_folder`).

    Returns
    -------
    list of str
        The file names written.
    """
    from .stimuli.gratings import combine_tables

    folder = Path(folder)
    if folder.exists() and not folder.is_dir():
        raise BadInput(folder, "--out", "exists and is not a folder")
    if (folder.is_dir() and any(p for p in folder.iterdir() if not p.name.startswith("."))
            and not (folder / STIMULUS_MANIFEST).is_file() and not (folder / MANIFEST).is_file()):
        raise BadInput(folder, "--out", "is a non-empty folder that holds no stimulus or session; choose another")
    folder.mkdir(parents=True, exist_ok=True)
    mpath = folder / STIMULUS_MANIFEST
    manifest = _read_json_object(mpath) if mpath.is_file() else {}
    old_sn, old_g = (None, None)
    if manifest:
        old_sn, old_g, _ = load_stimulus(folder)
    spath = folder / MANIFEST
    session = _read_json_object(spath) if spath.is_file() else {}
    if session.get("timing") is not None:
        raise BadInput(spath, "timing", "this folder holds an assembled session, whose measured times would no "
                                        "longer match a changed stimulus; use a new folder")
    hint = "add --overwrite to replace it (the other stimulus files are kept)"
    for name in (files or {}):
        if (folder / name).exists() and not overwrite:
            raise BadInput(folder / name, None, f"exists; {hint}")
    sn, g = old_sn, old_g
    if sparse_noise is not None:
        if (old_sn is not None or (folder / "sparse_noise.npy").exists()) and not overwrite:
            raise BadInput(folder / "sparse_noise.npy", None, f"exists; {hint}")
        sn = sparse_noise
    if gratings is not None:
        if old_g is None or overwrite:
            g = gratings
        else:
            if tuple(map(float, old_g.phase_origin_deg)) != tuple(map(float, gratings.phase_origin_deg)):
                raise BadInput(folder / "gratings.csv", "phase_origin_deg",
                               f"the gratings there use the phase origin {list(old_g.phase_origin_deg)}, these "
                               f"{list(gratings.phase_origin_deg)}; one table has one origin (--phase-origin-deg)")
            hit = _span_overlap(float(gratings.onset_s.min()), float(gratings.offset_s.max()),
                                old_g.onset_s, old_g.offset_s)
            if hit is not None:
                raise BadInput(folder / "gratings.csv", "onset_s", f"the new gratings ({gratings.onset_s.min():.6g} "
                                                                   f"to {gratings.offset_s.max():.6g} s) overlap this "
                                                                   f"presentation; start them after "
                                                                   f"{old_g.offset_s.max():.6g} s (--start-s)",
                               row=hit + 1)
            g = combine_tables(old_g, gratings)
    if sn is not None and g is not None:
        t0, t1 = float(sn.times_s[0]), float(sn.frame_ends_s()[-1])
        hit = _span_overlap(t0, t1, g.onset_s, g.offset_s)
        if hit is not None:
            raise BadInput(folder / "gratings.csv", "onset_s", f"the sparse noise ({t0:.6g} to {t1:.6g} s) and the "
                                                               f"gratings overlap in time (at {g.onset_s[hit]:.6g} s); "
                                                               f"give the later block a later --start-s")
    # the generator records: earlier calls of the kind replaced are dropped
    records = manifest.get("generator") or []
    records = list(records) if isinstance(records, list) else [records]
    if info is not None:
        kind = str(info.get("command", ""))
        if "sparse-noise" in kind or overwrite or old_g is None:
            records = [r for r in records if not (isinstance(r, dict) and str(r.get("command", "")) == kind)]
        records.append(info)
    # writes: the new data files, further files, then the manifests
    write_stimulus(folder, sparse_noise=sparse_noise, gratings=None if gratings is None else g)
    written = (["sparse_noise.npy", "sparse_noise_times.npy"] if sparse_noise is not None else []) + (
        ["gratings.csv"] if gratings is not None else [])
    new = {k: v for k, v in manifest.items() if k not in ("sparse_noise", "gratings", "display", "generator")}
    if sn is not None:
        new["sparse_noise"] = {"frames": "sparse_noise.npy", "times": "sparse_noise_times.npy",
                               "grid": sn.grid.to_manifest()}
    if g is not None:
        new["gratings"] = {"table": "gratings.csv", "phase_origin_deg": list(map(float, g.phase_origin_deg))}
    disp = display.to_manifest() if display is not None else manifest.get("display")
    if disp is not None:
        new["display"] = disp
    if records:
        new["generator"] = records
    for name, write in (files or {}).items():
        write(folder / name)
        written.append(name)
    session.update({k: new[k] for k in ("sparse_noise", "gratings", "display", "generator") if k in new})
    for path, content in ((mpath, new), (spath, session)):
        part = path.with_name(path.name + ".tmp")
        part.write_text(json.dumps(content, indent=2) + "\n", encoding="utf-8")
        os.replace(part, path)
    return written + [STIMULUS_MANIFEST, MANIFEST]


def load_stimulus(folder) -> tuple[SparseNoise | None, GratingTable | None, dict]:
    """Load a folder written by :func:`write_stimulus`, validated as a session's stimulus files are.

    Returns
    -------
    (SparseNoise or None, GratingTable or None, dict)
        The stimuli and the raw ``stimulus.json`` manifest.
    """
    folder = Path(folder)
    mpath = folder / STIMULUS_MANIFEST
    manifest = _read_json_object(mpath)
    notes: list = []
    sparse, gratings = _load_stimuli(folder, manifest, notes)
    return sparse, gratings, manifest
