"""Replay a recorded (or simulated) session into a folder as a recording would write it.

For tests and demonstrations of ``map2d watch``: the sparse-noise stimulus is written first (as
``map2d stimulus sparse-noise`` writes it: ``stimulus.json`` and ``sparse_noise.npy``), then the frame
onsets and spikes are appended to ``frame_times.txt`` and ``spikes.txt`` in the append formats of
:mod:`map2d.watch`, step by step of recording time, in real time or faster. A replay can also play a
writer that crashes in the middle of a line and restarts (it then appends a ``#`` line, sends the last
frame lines again and goes on), to exercise the reader.
"""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np

from .contract import SparseNoise, Spikes, Traces, load_session, write_stimulus
from .errors import BadInput
from .watch import FRAME_TIMES_FILE, SPIKES_FILE, TRACES_FILE

__all__ = ["replay_steps", "replay_session"]


def _frame_line(k, t) -> str:
    return f"{int(k)} {float(t)!r}\n"


def _spike_line(t, c) -> str:
    return f"{float(t)!r} {int(c)}\n"


def _sample_line(t, v) -> str:
    return f"{float(t)!r} " + " ".join(repr(float(x)) for x in v) + "\n"


def replay_steps(session, folder, step_s: float = 1.0, crash_at_s: float | None = None,
                 seconds: float | None = None):
    """Write ``session`` into ``folder`` step by step; a generator yielding the recording time written
    so far after each step (the caller decides how fast to go on).

    Parameters
    ----------
    session : Session
        With sparse noise and spikes.
    folder : path
        Created if needed; must not hold ``frame_times.txt`` or ``spikes.txt`` yet.
    step_s : float
        Recording time per step.
    crash_at_s : float, optional
        At this recording time the writer stops in the middle of a spike line and of a frame line,
        then restarts: it appends a ``#`` line, sends the last 5 frame lines again, and goes on.
    seconds : float, optional
        Stop after this much recording time (default: the whole sparse noise).
    """
    sn = session.sparse_noise
    r = session.responses
    if sn is None or not isinstance(r, (Spikes, Traces)):
        raise BadInput(getattr(session, "path", None) or "session", None,
                       "replay needs a session with sparse noise and spikes or traces")
    if isinstance(r, Traces):
        yield from _replay_traces(sn, r, folder, step_s, crash_at_s, seconds)
        return
    if not (np.isfinite(step_s) and step_s > 0):
        raise ValueError(f"step_s must be positive, got {step_s}")
    folder = _start_folder(folder, sn, SPIKES_FILE)
    times = sn.times_s
    t0 = float(times[0])
    end = float(sn.frame_ends_s()[-1]) if seconds is None else min(t0 + seconds, float(sn.frame_ends_s()[-1]))
    order = np.argsort(r.time_s, kind="stable")
    st, sc = r.time_s[order], r.cell[order]
    st_keep = (st >= t0 - 1.0) & (st < end + 1.0)
    st, sc = st[st_keep], sc[st_keep]
    ff = open(folder / FRAME_TIMES_FILE, "a", encoding="utf-8")
    fs = open(folder / SPIKES_FILE, "a", encoding="utf-8")
    try:
        ff.write("# frame onset_s (map2d replay)\n")
        fs.write("# time_s cell (map2d replay)\n")
        now, kf, ks = t0, 0, 0
        crashed = crash_at_s is None
        while now < end:
            now = min(now + step_s, end)
            kf2 = int(np.searchsorted(times, now, side="left"))
            ks2 = int(np.searchsorted(st, now, side="left"))
            ff.write("".join(_frame_line(k, times[k]) for k in range(kf, kf2)))
            fs.write("".join(_spike_line(st[i], sc[i]) for i in range(ks, ks2)))
            kf, ks = kf2, ks2
            if not crashed and now >= t0 + crash_at_s and kf < times.size and ks < st.size:
                crashed = True
                ff.write(_frame_line(kf, times[kf])[:-4])               # half lines, then the restart
                fs.write(_spike_line(st[ks], sc[ks])[:-3])
                ff.flush()
                fs.flush()
                yield now - t0
                ff.write("# writer restarted\n")
                fs.write("# writer restarted\n")
                ff.write("".join(_frame_line(k, times[k]) for k in range(max(kf - 5, 0), kf)))
            ff.flush()
            fs.flush()
            yield now - t0
    finally:
        ff.close()
        fs.close()


def _start_folder(folder, sn, responses_file):
    """Create the replay folder (refusing one that already holds the frame-times or ``responses_file``
    stream) and write the stimulus the streams refer to; returns the folder as a Path."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    for name in (FRAME_TIMES_FILE, responses_file):
        if (folder / name).exists():
            raise BadInput(folder / name, None, "exists already; replay into a new folder")
    write_stimulus(folder, sparse_noise=SparseNoise(np.asarray(sn.frames), sn.times_s, sn.grid),
                   info={"command": "replay"})
    return folder


def _replay_traces(sn, r, folder, step_s, crash_at_s, seconds):
    """:func:`replay_steps` for imaging traces: ``traces.txt`` lines ``TIME_S v0 ... v(n-1)`` (every
    cell's sample at that time, ``nan`` where it has none). A crash leaves half a sample line; the
    restarted writer appends a ``#`` line and sends its last 3 sample lines and 5 frame lines again."""
    if not (np.isfinite(step_s) and step_s > 0):
        raise ValueError(f"step_s must be positive, got {step_s}")
    if r.ids is not None and not np.array_equal(r.cell_ids, np.arange(r.cell_ids.size)):
        raise BadInput("session", "responses.cell_ids", "replay writes traces of cells 0..n-1 (rows in order)")
    folder = _start_folder(folder, sn, TRACES_FILE)
    times, st = sn.times_s, np.asarray(r.times_s, dtype=np.float64)
    vals = np.asarray(r.values)
    t0 = float(times[0])
    last = float(sn.frame_ends_s()[-1])
    end = last if seconds is None else min(t0 + seconds, last)
    ff = open(folder / FRAME_TIMES_FILE, "a", encoding="utf-8")
    ft = open(folder / TRACES_FILE, "a", encoding="utf-8")
    try:
        ff.write("# frame onset_s (map2d replay)\n")
        ft.write("# time_s value of cell 0, 1, ... (map2d replay)\n")
        now, kf = t0, 0
        ks = int(np.searchsorted(st, t0 - 1.0, side="left"))
        crashed = crash_at_s is None
        while now < end:
            now = min(now + step_s, end)
            kf2 = int(np.searchsorted(times, now, side="left"))
            ks2 = int(np.searchsorted(st, now, side="left"))
            ff.write("".join(_frame_line(k, times[k]) for k in range(kf, kf2)))
            ft.write("".join(_sample_line(st[i], vals[:, i]) for i in range(ks, ks2)))
            kf, ks = kf2, ks2
            if not crashed and now >= t0 + crash_at_s and kf < times.size and ks < st.size:
                crashed = True
                ff.write(_frame_line(kf, times[kf])[:-4])
                ft.write(_sample_line(st[ks], vals[:, ks])[:-5])
                ff.flush()
                ft.flush()
                yield now - t0
                ff.write("# writer restarted\n")
                ft.write("# writer restarted\n")
                ff.write("".join(_frame_line(k, times[k]) for k in range(max(kf - 5, 0), kf)))
                ft.write("".join(_sample_line(st[i], vals[:, i]) for i in range(max(ks - 3, 0), ks)))
            ff.flush()
            ft.flush()
            yield now - t0
    finally:
        ff.close()
        ft.close()


def replay_session(source, folder, speed: float = 1.0, step_s: float = 0.5, seconds: float | None = None,
                   crash_at_s: float | None = None, quiet: bool = False) -> int:
    """``map2d replay SESSION DIR``: write the session into ``DIR`` at ``speed`` times real time
    (``inf``: as fast as possible)."""
    if not (speed > 0):
        raise BadInput("--speed", None, f"must be positive, got {speed}")
    session = load_session(source)
    start = time.monotonic()
    for written in replay_steps(session, folder, step_s=step_s, crash_at_s=crash_at_s, seconds=seconds):
        if np.isfinite(speed):
            wait = start + written / speed - time.monotonic()
            if wait > 0:
                time.sleep(wait)
    if not quiet:
        print(f"map2d replay: wrote {written:.1f} s of {source} into {folder}")
    return 0
