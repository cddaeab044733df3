"""Follow a session folder while a recording appends to it (``map2d watch``).

The folder holds the stimulus written beforehand by ``map2d stimulus sparse-noise`` (``stimulus.json``,
``sparse_noise.npy``) and two text files that the recording appends to (docs/live.md):

``frame_times.txt``
    one line per displayed sparse-noise frame: ``FRAME ONSET_S`` (frame index into
    ``sparse_noise.npy`` counted from 0, measured onset in seconds on the recording's clock).
``spikes.txt``
    one line per spike: ``TIME_S CELL`` (seconds on the same clock, integer cell id), in any order.
``traces.txt`` (imaging, instead of ``spikes.txt``)
    one line per sample: ``TIME_S V0 ... V(n-1)`` (one value per cell, ``nan`` allowed), times
    increasing; followed with ``--trace-decay off`` or a fixed time constant (:class:`map2d.live.LiveTraceMaps`).

Fields are separated by spaces, tabs or one comma. Empty lines and lines starting with ``#`` are
skipped. A line is read only once its newline has arrived, so a half-written line waits for the next
poll. A writer that (re)starts first appends a line starting with ``#``: a line that a crashed writer
left unfinished then holds a ``#`` after its start, and is skipped as torn (never mis-parsed). Frame
lines may repeat (a restarted writer sending them again): a repeat with the same onset is ignored, a
frame whose onset disagrees with the one already read is skipped and reported. A file that is
replaced by a different one (truncated, or renamed over) is read again from its start, and the maps
are rebuilt from what the files then hold.

This module reads the files (:class:`AppendedFile`, :class:`Follower`) and writes the assembled
session at the end (:func:`write_recorded_session`); the maps themselves are :mod:`map2d.live`.
"""

from __future__ import annotations

import json
import os
import re
import zlib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .contract import LIMITS, MANIFEST, STIMULUS_MANIFEST, SparseNoise, _read_json_object
from .errors import BadInput
from .live import AUTO_DECAY_LIVE, LiveSparseMaps, LiveTraceMaps

__all__ = ["FRAME_TIMES_FILE", "SPIKES_FILE", "TRACES_FILE", "parse_trace_lines", "AppendedFile", "Follower", "write_recorded_session",
           "parse_lines", "load_stimulus_noise"]

FRAME_TIMES_FILE = "frame_times.txt"
SPIKES_FILE = "spikes.txt"
TRACES_FILE = "traces.txt"
RECORDED_TRACES_FILE = "traces.npy"
RECORDED_TRACE_TIMES_FILE = "trace_times.npy"
RECORDED_FRAMES_FILE = "sparse_noise_recorded.npy"
MEASURED_TIMES_FILE = "frame_times.npy"
RECORDED_SPIKES_FILE = "spikes.npz"
WATCH_NOTE = "written by map2d watch from frame_times.txt and spikes.txt"
WATCH_NOTE_TRACES = "written by map2d watch from frame_times.txt and traces.txt"

_T_LOW, _T_HIGH = LIMITS["time_s"][:2]
_SPLIT = re.compile(r"[ \t]+|[ \t]*,[ \t]*")
_INT = re.compile(r"[+-]?\d+\Z")


class AppendedFile:
    """A text file that a writer appends lines to: each :meth:`read` returns the complete new lines.

    Keeps the byte offset of the last complete line and a checksum of everything read. When the file
    shrinks, or another file now has its name (inode), and its first bytes are not what was read, it
    is a new file: :meth:`read` then returns its lines from the start with ``replaced=True``.
    """

    def __init__(self, path):
        self.path = Path(path)
        self.offset = 0
        self.crc = 0
        self.ident = None
        self.line_no = 0          # lines returned so far (1-based numbers of the next line)

    def _same_prefix(self) -> bool:
        try:
            with open(self.path, "rb") as fh:
                head = fh.read(self.offset)
        except OSError:
            return False
        return len(head) == self.offset and zlib.crc32(head) == self.crc

    def read(self):
        """-> (number of the first new line, text of the complete new lines, replaced)."""
        try:
            st = os.stat(self.path)
        except FileNotFoundError:
            return self.line_no + 1, "", False
        ident = (st.st_dev, st.st_ino)
        replaced = False
        if (self.ident is not None and ident != self.ident) or st.st_size < self.offset:
            if not self._same_prefix():
                self.offset, self.crc, self.line_no, replaced = 0, 0, 0, True
        self.ident = ident
        first = self.line_no + 1
        if st.st_size <= self.offset:
            return first, "", replaced
        with open(self.path, "rb") as fh:
            fh.seek(self.offset)
            data = fh.read(st.st_size - self.offset)
        end = data.rfind(b"\n")
        if end < 0:
            return first, "", replaced                    # half a line: read it next time
        done = data[:end + 1]
        self.offset += len(done)
        self.crc = zlib.crc32(done, self.crc)
        self.line_no += done.count(b"\n")
        return first, done.decode("utf-8", errors="replace"), replaced


def _load_block(text):
    """All lines at once as a 2-D float array, or None when a line is torn, has an empty field or
    does not read as numbers (the caller then parses line by line)."""
    import io
    import warnings

    if ",," in text or ("#" in text and text.count("#") != text.count("\n#") + text.startswith("#")):
        return None
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")                       # an empty block warns
            return np.loadtxt(io.StringIO(text.replace(",", " ")), dtype=np.float64, comments="#", ndmin=2)
    except ValueError:
        return None


def _parse_fast(text, kinds):
    """All lines at once when every line is a comment or a good record (None otherwise)."""
    a = _load_block(text)
    if a is None:
        return None
    if a.size == 0:
        return [np.zeros(0, np.int64 if k == "int" else np.float64) for k in kinds]
    if a.shape[1] != len(kinds) or not np.isfinite(a).all():
        return None
    out = []
    for j, k in enumerate(kinds):
        col = a[:, j]
        if k == "int":
            if np.any(col != np.round(col)) or np.any(np.abs(col) > 2.0 ** 53):
                return None
            col = col.astype(np.int64)
        out.append(col)
    return out


def parse_lines(text: str, kinds, first_line: int = 1):
    """Parse lines of whitespace- or comma-separated fields.

    ``kinds`` is a tuple of 'int' / 'float' per field; ``first_line`` the number of the first line
    (for messages). Returns the columns (arrays) of the good lines and ``bad``: a list of
    ``(line number, reason)``. Comments (lines starting with ``#``) and empty lines are skipped
    silently; a ``#`` after the start of a line marks it torn (see the module docstring).
    """
    fast = _parse_fast(text, kinds)
    if fast is not None:
        return fast, []
    cols = [[] for _ in kinds]
    bad = []
    for no, s, parts in _data_lines(text, first_line, bad):
        if len(parts) != len(kinds):
            bad.append((no, f"expected {len(kinds)} fields, got {len(parts)}"))
            continue
        vals = []
        for p, k in zip(parts, kinds):
            if k == "int":
                if not _INT.match(p):
                    break
                vals.append(int(p))
            else:
                try:
                    v = float(p)
                except ValueError:
                    break
                if not np.isfinite(v):
                    break
                vals.append(v)
        if len(vals) != len(kinds):
            bad.append((no, f"cannot read {s[:40]!r} as {' '.join(kinds)}"))
            continue
        for col, v in zip(cols, vals):
            col.append(v)
    arrays = [np.asarray(c, dtype=np.int64 if k == "int" else np.float64) for c, k in zip(cols, kinds)]
    return arrays, bad


def _data_lines(text, first_line, bad):
    """``(line number, stripped line, fields)`` of each data line of ``text``: blank and comment lines
    skipped, a line with a ``#`` after its start reported in ``bad`` as torn (a writer restarted in
    the middle of it)."""
    for no, line in enumerate(text.split("\n"), start=first_line):
        s = line.strip()
        if not s or s.startswith("#"):
            continue
        if "#" in s:
            bad.append((no, "torn line (a writer restarted in the middle of it)"))
            continue
        yield no, s, _SPLIT.split(s)


def _parse_traces_fast(text, n_values):
    """All lines at once when every line is a comment or a good sample line (None otherwise)."""
    a = _load_block(text)
    if a is None:
        return None
    if a.size == 0 or a.shape[1] < 2 or (n_values is not None and a.shape[1] != n_values + 1):
        return None
    t = a[:, 0]
    if not np.all((t >= _T_LOW) & (t <= _T_HIGH)) or np.isinf(a[:, 1:]).any():
        return None
    return np.ascontiguousarray(t), np.ascontiguousarray(a[:, 1:]), [], a.shape[1] - 1


def parse_trace_lines(text: str, n_values: int | None, first_line: int = 1):
    """Parse ``traces.txt`` lines: ``TIME_S v0 v1 ... v(n-1)``, one sample of every cell.

    ``n_values``: the number of values per line (None: taken from the first good line). A value may be
    ``nan`` (a sample without a valid value); the time must be finite. Returns ``(times (n,), values
    (n, n_values), bad, n_values)``; ``bad`` lists ``(line number, reason)`` as :func:`parse_lines`.
    """
    fast = _parse_traces_fast(text, n_values)
    if fast is not None:
        return fast
    times, rows, bad = [], [], []
    for no, s, parts in _data_lines(text, first_line, bad):
        if n_values is not None and len(parts) != n_values + 1:
            bad.append((no, f"expected {n_values + 1} fields (time and {n_values} values), got {len(parts)}"))
            continue
        if len(parts) < 2:
            bad.append((no, "expected a time and at least one value"))
            continue
        try:
            vals = [float(p) for p in parts]
        except ValueError:
            bad.append((no, f"cannot read {s[:40]!r} as numbers"))
            continue
        if not (_T_LOW <= vals[0] <= _T_HIGH) or any(np.isinf(v) for v in vals[1:]):
            bad.append((no, f"the time must be within {_T_LOW:g}..{_T_HIGH:g} s and values finite or nan"))
            continue
        n_values = len(parts) - 1
        times.append(vals[0])
        rows.append(vals[1:])
    n = 0 if n_values is None else n_values
    return (np.asarray(times, dtype=np.float64), np.asarray(rows, dtype=np.float64).reshape(len(rows), n),
            bad, n_values)


def load_stimulus_noise(folder) -> tuple[SparseNoise, dict]:
    """The sparse noise of a folder prepared for recording (``stimulus.json`` written by ``map2d
    stimulus sparse-noise``, or a ``session.json`` holding ``sparse_noise``) and that manifest."""
    from .contract import _load_stimuli

    folder = Path(folder)
    if not folder.is_dir():
        raise BadInput(folder, None, "folder not found")
    for name in (STIMULUS_MANIFEST, MANIFEST):
        path = folder / name
        if path.is_file():
            manifest = _read_json_object(path)
            if manifest.get("sparse_noise") is not None:
                sparse, _ = _load_stimuli(folder, {"sparse_noise": manifest["sparse_noise"]}, [])
                if not np.issubdtype(sparse.frames.dtype, np.integer):
                    raise BadInput(folder / manifest["sparse_noise"]["frames"], "frames",
                                   "watch follows sparse noise (+1/-1/0 frames); dense noise is analyzed offline")
                return sparse, manifest
    raise BadInput(folder / STIMULUS_MANIFEST, "sparse_noise",
                   "no sparse-noise stimulus found (write it first with map2d stimulus sparse-noise --out "
                   f"{folder})")


@dataclass
class FollowState:
    """What the follower has read so far (for the summary and the final session)."""

    frames_read: int = 0
    spikes_read: int = 0
    bad_lines: list = field(default_factory=list)     # (file, line, reason), first few kept
    n_bad: int = 0
    repeated_frames: int = 0
    conflicting_frames: int = 0
    held_frames: int = 0                               # frame lines waiting for an earlier frame
    restarts: int = 0                                  # files replaced, maps rebuilt
    samples_read: int = 0                              # imaging samples (traces.txt)
    repeated_samples: int = 0


class Follower:
    """Reads the appended files of ``folder`` into a :class:`map2d.live.LiveSparseMaps`.

    Parameters
    ----------
    folder : path
    max_lag_s, alpha, min_shift_s : see :class:`map2d.live.LiveSparseMaps`.
    """

    def __init__(self, folder, max_lag_s: float = 0.2, alpha: float = 0.01, min_shift_s: float = 10.0,
                 trace_decay="auto"):
        from .traces import parse_trace_decay

        try:
            self.trace_decay = parse_trace_decay(trace_decay)
        except ValueError as exc:
            raise BadInput("--trace-decay", None, str(exc)) from None
        self.folder = Path(folder)
        self.noise, self.manifest = load_stimulus_noise(self.folder)
        self.kw = dict(max_lag_s=max_lag_s, alpha=alpha, min_shift_s=min_shift_s)
        nominal = self.noise.frame_interval_s
        if not (np.isfinite(nominal) and nominal > 0):
            raise BadInput(self.folder / STIMULUS_MANIFEST, "sparse_noise.times", "needs at least two frames")
        if map_lags_count(nominal, max_lag_s) >= self.noise.n_frames:
            raise BadInput("--max-lag", None, f"{max_lag_s} s spans the whole stimulus")
        self.frames_file = AppendedFile(self.folder / FRAME_TIMES_FILE)
        self.spikes_file = AppendedFile(self.folder / SPIKES_FILE)
        self.traces_file = AppendedFile(self.folder / TRACES_FILE)
        self.mode = None                  # 'spikes' or 'traces', from the first response file that appears
        self.n_values = None              # values per trace line
        self.sample_t: list = []
        self.sample_v: list = []
        self.state = FollowState()
        self._reset_maps()
        self.onsets = np.zeros(0)
        self.held: dict[int, float] = {}
        self.spike_t: list = []
        self.spike_c: list = []

    def _reset_maps(self):
        if getattr(self, "mode", None) == "traces" and self.n_values:
            self.live = LiveTraceMaps(self.noise.frames, self.noise.grid, self.n_values,
                                      frame_s=self.noise.frame_interval_s, decay=self.trace_decay, **self.kw)
        else:
            self.live = LiveSparseMaps(self.noise.frames, self.noise.grid, frame_s=self.noise.frame_interval_s,
                                       **self.kw)

    def _choose_mode(self):
        """Spikes or traces: whichever response file the recording writes (both: refused)."""
        has_s = (self.folder / SPIKES_FILE).is_file()
        has_t = (self.folder / TRACES_FILE).is_file()
        if has_s and has_t:
            raise BadInput(self.folder / TRACES_FILE, None, f"the folder holds both {SPIKES_FILE} and "
                                                            f"{TRACES_FILE}; a recording appends one of them")
        if has_t:
            if self.trace_decay == "auto":
                raise BadInput("--trace-decay", None, AUTO_DECAY_LIVE)
            self.mode = "traces"
        elif has_s:
            self.mode = "spikes"

    def _poll_traces(self) -> bool:
        first, text, replaced = self.traces_file.read()
        changed = False
        if replaced:
            self.state.restarts += 1
            self.sample_t, self.sample_v, self.n_values = [], [], None
            self._reset_maps()
            self.live.add_frame_times(self.onsets)
            changed = True
        if not text:
            return changed
        t, v, bad, n = parse_trace_lines(text, self.n_values, first)
        for no, why in bad:
            self._bad(TRACES_FILE, no, why)
        if t.size == 0:
            return changed
        if self.n_values is None:
            if n < 1:
                return changed
            self.n_values = n
            self._reset_maps()                                   # now a LiveTraceMaps
            self.live.add_frame_times(self.onsets)
        last = self.sample_t[-1][-1] if self.sample_t else -np.inf
        keep = np.ones(t.size, dtype=bool)
        for i in range(t.size):
            if t[i] > last:
                last = t[i]
                continue
            keep[i] = False
            block = (t[:i][keep[:i]], v[:i][keep[:i]])
            if self._is_repeat(float(t[i]), v[i], block):
                self.state.repeated_samples += 1
            else:
                self._bad(TRACES_FILE, None, f"sample at {float(t[i])!r} s is not after the previous sample; "
                                             f"skipped")
        t, v = t[keep], v[keep]
        if t.size:
            self.sample_t.append(t)
            self.sample_v.append(v)
            self.live.add_samples(t, v)
            self.state.samples_read += int(t.size)
            changed = True
        return changed

    def _is_repeat(self, t, v, block) -> bool:
        """A sample sent again by a restarted writer: same time and values as one already read."""
        for tt, vv in zip(reversed(self.sample_t + [block[0]]), reversed(self.sample_v + [block[1]])):
            if tt.size and tt[0] <= t:
                i = int(np.searchsorted(tt, t))
                return i < tt.size and tt[i] == t and np.array_equal(vv[i], v, equal_nan=True)
        return False

    def samples(self):
        """All samples read: (time_s (n,), values (n, cells))."""
        if not self.sample_t:
            return np.zeros(0), np.zeros((0, self.n_values or 0))
        return np.concatenate(self.sample_t), np.concatenate(self.sample_v)

    def _bad(self, file, no, reason):
        self.state.n_bad += 1
        if len(self.state.bad_lines) < 20:
            self.state.bad_lines.append((file, no, reason))

    def poll(self) -> bool:
        """Read what was appended since the last poll; True when anything new was used."""
        if self.mode is None:
            self._choose_mode()
        if self.mode == "traces":
            return self._poll_frames_only() | self._poll_traces()
        f_first, f_text, f_replaced = self.frames_file.read()
        s_first, s_text, s_replaced = self.spikes_file.read() if self.mode == "spikes" else (1, "", False)
        if f_replaced or s_replaced:
            self.state.restarts += 1
            if f_replaced:
                self.onsets, self.held = np.zeros(0), {}
            if s_replaced:
                self.spike_t, self.spike_c = [], []
            self._reset_maps()
            self.live.add_frame_times(self.onsets)
            if self.spike_t:
                self.live.add_spikes(np.concatenate(self.spike_t), np.concatenate(self.spike_c))
        changed = f_replaced or s_replaced
        if f_text:
            (k, t), bad = parse_lines(f_text, ("int", "float"), f_first)
            for no, why in bad:
                self._bad(FRAME_TIMES_FILE, no, why)
            changed |= self._take_frames(k, t)
        if s_text:
            (t, c), bad = parse_lines(s_text, ("float", "int"), s_first)
            for no, why in bad:
                self._bad(SPIKES_FILE, no, why)
            if t.size:
                self.spike_t.append(t)
                self.spike_c.append(c)
                self.live.add_spikes(t, c)
                self.state.spikes_read += int(t.size)
                changed = True
        self.state.frames_read = int(self.onsets.size)
        self.state.held_frames = len(self.held)
        return bool(changed)

    def _poll_frames_only(self) -> bool:
        first, text, replaced = self.frames_file.read()
        changed = False
        if replaced:
            self.state.restarts += 1
            self.onsets, self.held = np.zeros(0), {}
            self._reset_maps()
            if self.sample_t:
                t, v = self.samples()
                self.live.add_samples(t, v)
            changed = True
        if text:
            (k, t), bad = parse_lines(text, ("int", "float"), first)
            for no, why in bad:
                self._bad(FRAME_TIMES_FILE, no, why)
            changed |= self._take_frames(k, t)
        self.state.frames_read = int(self.onsets.size)
        self.state.held_frames = len(self.held)
        return changed

    def _take_frames(self, k, t) -> bool:
        F0 = self.onsets.size
        n_total = self.noise.n_frames
        for kk, tt in zip(k.tolist(), t.tolist()):
            if kk < 0 or kk >= n_total:
                self._bad(FRAME_TIMES_FILE, None, f"frame {kk} is not in the stimulus (0..{n_total - 1})")
                continue
            if kk < self.onsets.size:
                if tt == self.onsets[kk]:
                    self.state.repeated_frames += 1
                else:
                    self.state.conflicting_frames += 1
                    self._bad(FRAME_TIMES_FILE, None, f"frame {kk} again with onset {tt!r} "
                                                      f"(read before: {self.onsets[kk]!r}); kept the first")
                continue
            if kk in self.held:
                if self.held[kk] == tt:
                    self.state.repeated_frames += 1
                else:
                    self.state.conflicting_frames += 1
                    self._bad(FRAME_TIMES_FILE, None, f"frame {kk} again with another onset; kept the first")
                continue
            self.held[kk] = tt
        new = []
        n = self.onsets.size
        last = self.onsets[-1] if n else -np.inf
        while n + len(new) in self.held:
            tt = self.held.pop(n + len(new))
            if not tt > last:
                self._bad(FRAME_TIMES_FILE, None, f"frame {n + len(new)} onset {tt!r} is not after the "
                                                  f"previous frame's; frames from here wait")
                self.held[n + len(new)] = tt
                break
            new.append(tt)
            last = tt
        if new:
            self.onsets = np.concatenate([self.onsets, new])
            self.live.add_frame_times(np.asarray(new))
        return self.onsets.size > F0

    def spikes(self):
        """All spikes read: (time_s, cell)."""
        if not self.spike_t:
            return np.zeros(0), np.zeros(0, dtype=np.int64)
        return np.concatenate(self.spike_t), np.concatenate(self.spike_c)


def map_lags_count(frame_s, max_lag_s) -> int:
    from .maps import map_lags
    return int(map_lags(frame_s, max_lag_s).size)


def check_session_manifest(folder) -> None:
    """Refuse to start when ``session.json`` holds a session that ``watch`` did not write (it is
    written at the end of the recording)."""
    path = Path(folder) / MANIFEST
    if not path.is_file():
        return
    m = _read_json_object(path)
    if m.get("responses") is not None and m.get("notes") not in (WATCH_NOTE, WATCH_NOTE_TRACES):
        raise BadInput(path, "responses", "the folder already holds a recorded session; watch writes "
                                          "session.json at the end of a recording into a folder without one")


def _save_npy(path, arr):
    with open(path, "wb") as fh:
        np.save(fh, arr)


def write_recorded_session(follower: Follower) -> Path:
    """Write the recording as a session in its folder: the frames shown (``sparse_noise.npy`` when
    every frame was timed, else ``sparse_noise_recorded.npy``), their measured onsets
    (``frame_times.npy``), the spikes (``spikes.npz``) and ``session.json``. Files are written under
    temporary names and renamed into place, ``session.json`` last. Returns the folder.
    """
    from .contract import _save_npz

    folder = follower.folder
    check_session_manifest(folder)
    noise = follower.noise
    F = follower.onsets.size
    traces = follower.mode == "traces"
    if traces:
        t, v = follower.samples()
        what = "samples"
    else:
        t, c = follower.spikes()
        what = "spikes"
    if F < 2 or t.size < (2 if traces else 1):
        raise BadInput(folder, None, f"no recording to write ({F} frame onsets and {t.size} {what} read)")
    base = dict(follower.manifest)
    spec = dict(base.get("sparse_noise", {}))
    frames_rel = spec.get("frames", "sparse_noise.npy")
    tmp = []

    def put(name, writer):
        p = folder / f".{name}.partial-{os.getpid()}"
        writer(p)
        tmp.append((p, folder / name))

    if F < noise.n_frames:
        frames_rel = RECORDED_FRAMES_FILE
        put(RECORDED_FRAMES_FILE, lambda p: _save_npy(p, np.asarray(noise.frames[:F])))
    put(MEASURED_TIMES_FILE, lambda p: _save_npy(p, follower.onsets.astype(np.float64)))
    if traces:
        put(RECORDED_TRACES_FILE, lambda p: _save_npy(p, np.ascontiguousarray(v.T, dtype=np.float64)))
        put(RECORDED_TRACE_TIMES_FILE, lambda p: _save_npy(p, t.astype(np.float64)))
        responses = {"kind": "traces", "file": RECORDED_TRACES_FILE, "times": RECORDED_TRACE_TIMES_FILE}
    else:
        put(RECORDED_SPIKES_FILE, lambda p: _save_npz(p, time_s=t.astype(np.float64), cell=c.astype(np.int64)))
        responses = {"kind": "spikes", "file": RECORDED_SPIKES_FILE}
    spec.update(frames=frames_rel, times=MEASURED_TIMES_FILE)
    manifest = {"name": base.get("name", folder.name), "notes": WATCH_NOTE_TRACES if traces else WATCH_NOTE,
                "sparse_noise": spec, "responses": responses}
    if base.get("display") is not None:
        manifest["display"] = base["display"]
    put(MANIFEST, lambda p: p.write_text(json.dumps(manifest, indent=2) + "\n", encoding="utf-8"))
    for src, dst in tmp:
        os.replace(src, dst)
    return folder


def summary_line(follower: Follower, result, aperture) -> str:
    """One line for the terminal."""
    st = follower.state
    on = follower.onsets
    rec = float(on[-1] - on[0]) if on.size > 1 else 0.0
    data = f"{st.samples_read} samples" if follower.mode == "traces" else f"{st.spikes_read} spikes"
    text = f"{rec:7.1f} s, {on.size} frames, {data}"
    if result is not None:
        text += f"; {int(result.responsive.sum())} of {result.n_cells} cells responsive"
    if aperture is not None:
        text += (f"; aperture ({aperture.center_x_deg:.1f}, {aperture.center_y_deg:.1f}) "
                 f"+- {max(aperture.center_se_deg):.1f} deg, diameter {aperture.diameter_deg:.1f} "
                 f"+- {aperture.diameter_se_deg:.1f} deg")
    if st.n_bad:
        text += f"; {st.n_bad} lines skipped"
    return text


def watch_folder(folder, out=None, page=None, max_lag_s=0.2, seed=0, idle_s=60.0, poll_s=0.5,
                 refresh_s=2.0, summary_s=10.0, cells=None, fits=True, quiet=False, print_fn=print,
                 clock=None, sleep=None, stop=None, trace_decay="auto") -> dict:
    """Follow ``folder`` until no data arrived for ``idle_s`` seconds (or Ctrl-C), then write the
    session and the offline maps. Returns a dict with the final live result, the follower, the
    aperture and the paths written.

    ``clock``/``sleep``/``stop`` (a callable returning True to end) are for tests.
    """
    import time
    from datetime import datetime, timezone

    from .live import suggest_aperture
    from .report.live_page import live_page_data, write_live_page

    clock = clock or time.monotonic
    sleep = sleep or time.sleep
    folder = Path(folder)
    check_session_manifest(folder)
    started = clock()
    while True:        # the stimulus may be written a moment after watch starts
        try:
            follower = Follower(folder, max_lag_s=max_lag_s, trace_decay=trace_decay)
            break
        except BadInput:
            if any((folder / n).is_file() for n in (STIMULUS_MANIFEST, MANIFEST)) or clock() - started >= idle_s:
                raise
            sleep(poll_s)
    page = Path(page) if page is not None else folder / "live.html"
    out = Path(out) if out is not None else folder / "maps"
    result, aperture, version = None, None, 0
    last_data = last_page = last_summary = clock()
    dirty = True
    interrupted = False

    page_data = [None]

    def render(final=False):
        nonlocal result, aperture, version
        result = follower.live.snapshot()
        aperture = suggest_aperture(result, cells=cells) if result is not None else None
        version += 1
        on = follower.onsets
        traces = follower.mode == "traces"
        info = {"folder": str(folder), "frames": int(on.size),
                "spikes": follower.state.samples_read if traces else follower.state.spikes_read,
                "data_kind": "imaging samples" if traces else "spikes",
                "recorded_s": float(on[-1] - on[0]) if on.size > 1 else 0.0, "alpha": follower.live.alpha,
                "updated": datetime.now(timezone.utc).strftime("%H:%M:%S UTC")}
        if result is not None:
            page_data[0] = live_page_data(result, aperture, info)
            write_live_page(page, page_data[0], refresh_s=refresh_s, version=version, final=final)

    if not quiet:
        print_fn(f"map2d watch: following {folder} (page {page}); ends after {idle_s:g} s without data "
                 f"or on Ctrl-C")
    try:
        while True:
            if follower.poll():
                last_data = clock()
                dirty = True
            now = clock()
            if dirty and now - last_page >= refresh_s:
                render()
                dirty, last_page = False, now
            if not quiet and now - last_summary >= summary_s:
                print_fn("map2d watch: " + summary_line(follower, result, aperture))
                last_summary = now
            if now - last_data >= idle_s or (stop is not None and stop()):
                break
            sleep(poll_s)
    except KeyboardInterrupt:
        interrupted = True
    follower.poll()
    render(final=True)
    if not quiet:
        why = "interrupted" if interrupted else f"no new data for {idle_s:g} s"
        print_fn(f"map2d watch: recording ended ({why}): " + summary_line(follower, result, aperture))
        if follower.state.n_bad:
            for file, no, reason in follower.state.bad_lines[:5]:
                print_fn(f"map2d watch: skipped {file}" + (f" line {no}" if no else "") + f": {reason}")
    if result is None:
        what = (f"{follower.state.samples_read} imaging samples" if follower.mode == "traces"
                else f"{follower.state.spikes_read} spikes")
        raise BadInput(folder, None, f"no maps: {follower.onsets.size} frame onsets and {what} arrived")
    write_recorded_session(follower)
    from .pipeline import run_maps
    decay = follower.trace_decay if follower.mode == "traces" else "auto"
    run_maps(folder, out, max_lag_s=max_lag_s, seed=seed, quiet=True, fits=fits, trace_decay=decay)
    with np.load(out / "maps.npz") as z:
        diff = max(float(np.nanmax(np.abs(np.asarray(getattr(result, k)) - z[k]), initial=0.0))
                   for k in ("on", "off", "linear"))
        scale = max(float(np.nanmax(np.abs(z[k]), initial=0.0)) for k in ("on", "off", "linear"))
    from .contract import read_table
    header, rows = read_table(out / "cells.csv")
    col = header.index("responsive")
    n_off = sum(r[col].strip().lower() == "true" for r in rows)
    page_data[0]["info"]["note"] = (f" Offline analysis (map2d maps, circular-shift null): {n_off} of "
                                    f"{len(rows)} cells responsive; results in {out}.")
    write_live_page(page, page_data[0], refresh_s=refresh_s, version=version, final=True)
    if not quiet:
        resp_files = (f"{RECORDED_TRACES_FILE}, {RECORDED_TRACE_TIMES_FILE}" if follower.mode == "traces"
                      else RECORDED_SPIKES_FILE)
        print_fn(f"map2d watch: wrote the session ({MANIFEST}, {MEASURED_TIMES_FILE}, {resp_files}) "
                 f"and the offline maps into {out} ({n_off} of {len(rows)} cells responsive offline); live "
                 f"and offline maps differ by at most {diff:.2g} {result.unit} (largest map value {scale:.3g})")
        if follower.mode == "traces" and follower.trace_decay != "off":
            print_fn(f"map2d watch: the offline maps also smooth each cell's decay-corrected trace by a noise-"
                     f"dependent amount estimated from the whole trace (--trace-decay {follower.trace_decay:g}); "
                     f"the live maps use the plain inversion, so the two differ by more than rounding")
        if aperture is not None:
            print_fn(f"map2d watch: gratings next: {aperture.command()}")
    return {"result": result, "follower": follower, "aperture": aperture, "page": page, "out": out,
            "max_difference": diff, "interrupted": interrupted}
