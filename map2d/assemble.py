"""``map2d assemble``: a session folder from stimulus files, a recording and measured frame times.

The folder holds what ``map2d stimulus`` wrote (``stimulus.json`` naming ``sparse_noise.npy``,
``sparse_noise_times.npy`` and ``gratings.csv``, the nominal schedule on the stimulus computer's
clock). :func:`assemble_session` adds the responses and, from the measured onsets of the displayed
frames and presentations, the times on the recording's clock (:func:`map2d.timing.match_frame_times`):

- ``sparse_noise_measured_times.npy``: the measured onset of every sparse-noise frame; a frame that
  could not be timed gets the clock model's time and is listed in ``sparse_noise_untimed.npy``
  (``sparse_noise.untimed`` in the manifest: left out of the analysis);
- ``gratings_measured.csv``: the presentations with measured onsets (and offsets: the next measured
  onset for back-to-back presentations, else the onset plus the nominal duration on the recording's
  clock), a ``nominal_onset_s`` column added; presentations that could not be timed are left out;
- the responses (``spikes.npz``, or ``traces.npy`` and ``trace_times.npy``) and ``rois.tif``;
- ``session.json`` with a ``timing`` entry (offset, drift, jitter, counts) that the report shows.

The nominal files are kept. Everything is written to a temporary folder, the result is loaded and
validated as ``map2d analyze`` would, and only then moved into place; a failure changes nothing.
"""

from __future__ import annotations

import json
import os
import shutil
import warnings
from pathlib import Path

import numpy as np

from .errors import BadInput

__all__ = ["assemble_session", "read_spike_table", "read_times", "stimulus_onsets"]

MEASURED_TIMES = "sparse_noise_measured_times.npy"
UNTIMED = "sparse_noise_untimed.npy"
MEASURED_GRATINGS = "gratings_measured.csv"


def read_times(path, what="--frame-times") -> np.ndarray:
    """A 1-D array of times in seconds from ``.npy`` or a text file (one number per line; a header line
    is allowed), finite and strictly increasing."""
    path = Path(path)
    if not path.is_file():
        raise BadInput(path, what, "file not found")
    if path.suffix == ".npy":
        try:
            t = np.load(path, allow_pickle=False)
        except Exception as exc:
            raise BadInput(path, what, f"not a readable .npy file ({type(exc).__name__})") from None
    else:
        lines = path.read_text(encoding="utf-8-sig").split()
        try:
            float(lines[0])
        except (ValueError, IndexError):
            lines = lines[1:]              # a header
        try:
            t = np.array([float(v) for v in lines])
        except ValueError as exc:
            raise BadInput(path, what, f"holds text that is not a number ({exc})") from None
    t = np.asarray(t)
    if t.ndim != 1 or t.dtype.kind not in "iuf":
        raise BadInput(path, what, f"must be one number per frame, got {t.dtype} {t.shape}")
    t = t.astype(np.float64)
    bad = np.flatnonzero(~np.isfinite(t))
    if bad.size:
        raise BadInput(path, what, "is not finite", row=int(bad[0]))
    back = np.flatnonzero(np.diff(t) <= 0)
    if back.size:
        raise BadInput(path, what, f"times must increase strictly ({t[back[0] + 1]:.9g} follows {t[back[0]]:.9g})",
                       row=int(back[0]) + 1)
    return t


def read_spike_table(path):
    """Spike times and cells from ``.npz`` (arrays ``time_s`` and ``cell``) or CSV/TSV (a time column and
    a cell column: named ``time_s``/``time`` and ``cell`` in a header, or the first two columns)."""
    path = Path(path)
    if not path.is_file():
        raise BadInput(path, "--spikes", "file not found")
    if path.suffix == ".npz":
        try:
            with np.load(path, allow_pickle=False) as z:
                missing = [k for k in ("time_s", "cell") if k not in z.files]
                if missing:
                    raise BadInput(path, missing[0], "array is missing")
                return np.asarray(z["time_s"]), np.asarray(z["cell"])
        except BadInput:
            raise
        except Exception as exc:
            raise BadInput(path, "--spikes", f"not a readable .npz file ({type(exc).__name__})") from None
    text = path.read_text(encoding="utf-8-sig")
    lines = [ln for ln in text.splitlines() if ln.strip()]
    if not lines:
        raise BadInput(path, "--spikes", "is empty")
    sep = "\t" if "\t" in lines[0] else ","
    first = [v.strip() for v in lines[0].split(sep)]
    ti, ci = 0, 1
    try:
        [float(v) for v in first[:2]]
        body = lines
    except ValueError:              # a header: find the columns
        names = [v.lower() for v in first]
        ti = next((i for i, v in enumerate(names) if v in ("time_s", "time", "t", "spike_time_s")), None)
        ci = next((i for i, v in enumerate(names) if v in ("cell", "unit", "cluster", "cell_id")), None)
        if ti is None or ci is None:
            raise BadInput(path, "header", f"needs a time column (time_s) and a cell column (cell), got {first}")
        body = lines[1:]
    first_row = 1 if body is not lines else 0          # row numbers as in the file's data rows
    t = np.empty(len(body))
    c = np.empty(len(body), dtype=np.int64)
    for k, ln in enumerate(body):
        parts = ln.split(sep)
        try:
            t[k] = float(parts[ti])
            cv = float(parts[ci])
        except (ValueError, IndexError):
            raise BadInput(path, None, f"'{ln.strip()}' is not a time and a cell", row=k + first_row) from None
        if cv != int(cv):
            raise BadInput(path, "cell", f"{parts[ci].strip()} is not an integer", row=k + first_row)
        c[k] = int(cv)
    return t, c


def stimulus_onsets(sparse, gratings):
    """Nominal onsets of every sparse-noise frame and grating presentation, in time order.

    Returns
    -------
    onsets : ndarray (n,)
    which : ndarray (n,) int  0 for a sparse-noise frame, 1 for a grating row
    index : ndarray (n,) int  the frame or row number
    """
    parts = []
    if sparse is not None:
        parts.append((np.asarray(sparse.times_s, float), 0))
    if gratings is not None and len(gratings):
        parts.append((np.asarray(gratings.onset_s, float), 1))
    onsets = np.concatenate([p[0] for p in parts])
    which = np.concatenate([np.full(p[0].size, p[1]) for p in parts])
    index = np.concatenate([np.arange(p[0].size) for p in parts])
    order = np.argsort(onsets, kind="stable")
    return onsets[order], which[order], index[order]


def _measured_gratings(g, measured, timed, slope):
    """Grating columns with measured onsets/offsets (timed rows only) and ``nominal_onset_s``."""
    from .contract import GRATING_COLUMNS, _fmt_exact

    on_nom, off_nom = np.asarray(g.onset_s, float), np.asarray(g.offset_s, float)
    on = np.asarray(measured, float)
    off = on + slope * (off_nom - on_nom)
    nxt = np.r_[on[1:], np.nan]
    back_to_back = np.r_[np.abs(on_nom[1:] - off_nom[:-1]) < 1e-9, False]
    use_next = back_to_back & np.isfinite(nxt)
    off[use_next] = nxt[use_next]
    keep = np.asarray(timed, bool)
    cols = {c: np.asarray(getattr(g, c), float)[keep] for c in GRATING_COLUMNS}
    cols["onset_s"], cols["offset_s"] = on[keep], off[keep]
    extra = {k: [v for v, t in zip(vals, keep) if t] for k, vals in (g.extra or {}).items()}
    extra["nominal_onset_s"] = [_fmt_exact(float(v)) for v in on_nom[keep]]
    return cols, extra


def assemble_session(folder, frame_times=None, spikes=None, traces=None, trace_times=None, rois=None,
                     name=None, overwrite=False):
    """Write ``session.json`` (and the files it needs) into a stimulus folder; module notes.

    Parameters
    ----------
    folder : str or Path
        Holds ``stimulus.json`` and the stimulus files (``map2d stimulus``).
    frame_times : str or Path, optional
        Measured onsets, one per displayed frame and presentation, on the recording's clock. Without
        it the nominal times are used as they are (the stimulus and recording clocks must then agree).
    spikes : str or Path, optional
        ``.npz`` (``time_s``, ``cell``) or CSV/TSV.
    traces, trace_times : str or Path, optional
        ``.npy`` (cells, samples) and ``.npy`` or text sample times. Give spikes or traces.
    rois : str or Path, optional
        ROI label image (TIFF; label = cell id + 1).
    name : str, optional
    overwrite : bool
        Replace a ``session.json`` that already has responses.

    Returns
    -------
    (Path, FrameTiming or None)
    """
    from .contract import (STIMULUS_MANIFEST, InputWarning, _fmt_exact, _read_json_object, _save_npz,
                           load_session, load_stimulus, write_table)
    from .timing import match_frame_times

    folder = Path(folder)
    if not (folder / STIMULUS_MANIFEST).is_file():
        raise BadInput(folder / STIMULUS_MANIFEST, None, "file not found: the folder must hold the stimulus "
                                                         "files written by map2d stimulus")
    if (spikes is None) == (traces is None):
        raise BadInput("--spikes/--traces", None, "give either --spikes or --traces")
    if traces is not None and trace_times is None:
        raise BadInput("--trace-times", None, "is needed with --traces")
    mpath = folder / "session.json"
    if mpath.is_file() and not overwrite:
        old = _read_json_object(mpath)
        if old.get("responses") is not None:
            raise BadInput(mpath, "responses", "the folder already holds a session; use --overwrite to replace it")
    sparse, gratings, stim = load_stimulus(folder)
    if sparse is None and (gratings is None or not len(gratings)):
        raise BadInput(folder / STIMULUS_MANIFEST, None, "names no stimulus")

    timing = None
    sn_times = None if sparse is None else np.asarray(sparse.times_s, float)
    untimed = np.zeros(0, dtype=np.int64)
    g_cols = None
    if frame_times is not None:
        measured = read_times(frame_times)
        onsets, which, index = stimulus_onsets(sparse, gratings)
        if np.any(np.diff(onsets) <= 0):
            k = int(np.flatnonzero(np.diff(onsets) <= 0)[0])
            raise BadInput(folder / STIMULUS_MANIFEST, None, f"two stimulus onsets coincide at {onsets[k]:.9g} s "
                                                             f"(sparse noise and gratings overlap?): cannot tell "
                                                             f"their pulses apart")
        timing = match_frame_times(onsets, measured, where=str(frame_times))
        t_all = np.where(timing.timed, timing.measured_s, timing.predicted_s)
        if sparse is not None:
            sel = which == 0
            sn_times = np.empty(sparse.n_frames)
            sn_times[index[sel]] = t_all[sel]
            untimed = np.sort(index[sel][~timing.timed[sel]])
            if np.any(np.diff(sn_times) <= 0):
                k = int(np.flatnonzero(np.diff(sn_times) <= 0)[0])
                raise BadInput(frame_times, None, f"the matched sparse-noise onsets do not increase at frame {k + 1}")
        if gratings is not None and len(gratings):
            sel = which == 1
            m_on = np.empty(len(gratings))
            ok = np.zeros(len(gratings), dtype=bool)
            m_on[index[sel]] = t_all[sel]
            ok[index[sel]] = timing.timed[sel]
            g_cols = _measured_gratings(gratings, m_on, ok, 1.0 + timing.drift)

    tmp = folder / ".map2d-assemble-tmp"
    if tmp.exists():
        shutil.rmtree(tmp)
    tmp.mkdir()
    written = []
    try:
        manifest = {"name": name or stim.get("name") or folder.resolve().name}
        if sparse is not None:
            sn_spec = dict(stim["sparse_noise"])
            sn_spec["frames"] = "../" + sn_spec["frames"]
            if frame_times is not None:
                np.save(tmp / MEASURED_TIMES, sn_times)
                written.append(MEASURED_TIMES)
                sn_spec["times"] = MEASURED_TIMES
                if untimed.size:
                    np.save(tmp / UNTIMED, untimed.astype(np.int64))
                    written.append(UNTIMED)
                    sn_spec["untimed"] = UNTIMED
            else:
                sn_spec["times"] = "../" + sn_spec["times"]
            manifest["sparse_noise"] = sn_spec
        if gratings is not None and len(gratings):
            g_spec = dict(stim["gratings"])
            if g_cols is not None:
                cols, extra = g_cols
                if not cols["onset_s"].size:
                    raise BadInput(frame_times, None, "no grating presentation could be timed")
                write_table(tmp / MEASURED_GRATINGS, {**{k: [_fmt_exact(float(v)) for v in vals] for k, vals in cols.items()},
                                                       **{k: list(v) for k, v in extra.items()}})
                written.append(MEASURED_GRATINGS)
                g_spec["table"] = MEASURED_GRATINGS
            else:
                g_spec["table"] = "../" + g_spec["table"]
            g_spec["phase_origin_deg"] = list(map(float, gratings.phase_origin_deg))
            manifest["gratings"] = g_spec
        if spikes is not None:
            t, c = read_spike_table(spikes)
            _save_npz(tmp / "spikes.npz", time_s=np.asarray(t), cell=np.asarray(c))
            written.append("spikes.npz")
            manifest["responses"] = {"kind": "spikes", "file": "spikes.npz"}
        else:
            tp = Path(traces)
            if not tp.is_file():
                raise BadInput(tp, "--traces", "file not found")
            shutil.copyfile(tp, tmp / "traces.npy")
            times = read_times(trace_times, "--trace-times")
            np.save(tmp / "trace_times.npy", times)
            written += ["traces.npy", "trace_times.npy"]
            manifest["responses"] = {"kind": "traces", "file": "traces.npy", "times": "trace_times.npy"}
        if rois is not None:
            rp = Path(rois)
            if not rp.is_file():
                raise BadInput(rp, "--rois", "file not found")
            shutil.copyfile(rp, tmp / "rois.tif")
            written.append("rois.tif")
            manifest["rois"] = {"file": "rois.tif", "label_offset": 1}
        for key in ("display", "generator"):
            if stim.get(key) is not None:
                manifest[key] = stim[key]
        if timing is not None:
            manifest["timing"] = {"frame_times": Path(frame_times).name, **timing.report()}
        (tmp / "session.json").write_text(json.dumps(manifest, indent=2) + "\n", encoding="utf-8")
        with warnings.catch_warnings(record=True) as caught:     # validated as map2d analyze will read it
            warnings.simplefilter("always", InputWarning)
            load_session(tmp)
        # move into place: the files first, session.json last (without ../ in its paths)
        final = json.loads(json.dumps(manifest))
        for key, sub in (("sparse_noise", ("frames", "times")), ("gratings", ("table",))):
            for k in sub:
                if key in final and str(final[key][k]).startswith("../"):
                    final[key][k] = final[key][k][3:]
        for f in written:
            os.replace(tmp / f, folder / f)
        if sparse is not None and "untimed" not in final.get("sparse_noise", {}) and (folder / UNTIMED).exists():
            (folder / UNTIMED).unlink()         # from an earlier assembly
        part = folder / "session.json.tmp"
        part.write_text(json.dumps(final, indent=2) + "\n", encoding="utf-8")
        os.replace(part, mpath)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    for w in caught:                            # what the loader noted, naming the files in place
        warnings.warn(str(w.message).replace(str(tmp), str(folder)), InputWarning, stacklevel=2)
    return folder, timing
