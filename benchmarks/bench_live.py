"""Cost of the live (incremental) maps of ``map2d watch`` per minute of recorded data.

What is timed
-------------
A sparse-noise session (default: 10 minutes at 20 Hz on the 16 x 24 grid, 4 spots per frame, as
``map2d stimulus sparse-noise`` makes by default; 300 cells firing 10 spikes/s on average, a third of
them driven by one pixel) is written into a folder as a recording writes it (``frame_times.txt`` and
``spikes.txt``, by :func:`map2d.replay.replay_steps`, one step per second of recording), and read back
step by step:

- **update**: :meth:`map2d.watch.Follower.poll` after each step: reading and parsing the new lines and
  adding them to the running sums of every cell, lag and live null shift;
- **snapshot**: one :meth:`map2d.live.LiveSparseMaps.snapshot` (maps, z-scores, live responsive call)
  plus the aperture suggestion, as taken at each page refresh (every 2 s by default).

With ``--traces`` the cells are imaged instead (``traces.txt``, 30 samples/s, one value per cell per
line, Gaussian noise plus, for a third of the cells, a response to one pixel decaying with a 0.4-s
time constant), followed with ``--trace-decay off`` or ``--decay SECONDS``.

The update cost is reported per minute of data (target: under 1 s for 300 cells on 2 cores), as
wall time and as the process's CPU time (all threads; on a machine shared with other work the CPU
time is the steadier number). The process is pinned to 2 cores when the machine has more. At the end the live maps are checked against
:func:`map2d.maps.compute_maps` on the same data.

Run ``python benchmarks/bench_live.py --help``.
"""

from __future__ import annotations

import argparse
import json
import os
import tempfile
import time
from pathlib import Path

import numpy as np

from map2d.contract import Session, SparseNoise, Spikes, Traces
from map2d.geometry import Grid
from map2d.live import suggest_aperture
from map2d.maps import compute_maps
from map2d.replay import replay_steps
from map2d.stimuli.sparse_noise import make_sparse_noise
from map2d.watch import Follower


def make_session(minutes, cells, rate_hz, seed=0):
    rng = np.random.default_rng(seed)
    grid = Grid(ny=16, nx=24, center_x_deg=0.0, center_y_deg=0.0, dx_deg=2.0, dy_deg=2.0)
    sn = make_sparse_noise(grid, duration_s=minutes * 60.0, rate_hz=20.0, spots_per_frame=4, rng=seed)
    T = minutes * 60.0
    counts = rng.poisson(rate_hz * T, cells)
    t = [rng.uniform(0, T, n) for n in counts]
    c = [np.full(n, i) for i, n in enumerate(counts)]
    flat = sn.frames.reshape(sn.n_frames, -1)
    for i in range(0, cells, 3):                       # a third of the cells: one pixel drives them
        hit = np.flatnonzero(flat[:, rng.integers(flat.shape[1])] == rng.choice([-1, 1]))
        t.append(sn.times_s[hit] + 0.075)
        c.append(np.full(hit.size, i))
    t, c = np.concatenate(t), np.concatenate(c)
    return Session(responses=Spikes(t, c), sparse_noise=SparseNoise(sn.frames, sn.times_s, grid))


def make_trace_session(minutes, cells, seed=0, rate_hz=30.0, tau_s=0.4):
    from scipy.signal import lfilter

    rng = np.random.default_rng(seed)
    grid = Grid(ny=16, nx=24, center_x_deg=0.0, center_y_deg=0.0, dx_deg=2.0, dy_deg=2.0)
    sn = make_sparse_noise(grid, duration_s=minutes * 60.0, rate_hz=20.0, spots_per_frame=4, rng=seed)
    t = np.arange(0.0, sn.times_s[-1] + 1.0, 1.0 / rate_hz)
    v = rng.normal(0.0, 0.1, (cells, t.size))
    flat = sn.frames.reshape(sn.n_frames, -1)
    a = np.exp(-1.0 / rate_hz / tau_s)
    for i in range(0, cells, 3):                       # a third of the cells: one pixel drives them
        hit = np.flatnonzero(flat[:, rng.integers(flat.shape[1])] == rng.choice([-1, 1]))
        kick = np.zeros(t.size)
        np.add.at(kick, np.minimum(np.searchsorted(t, sn.times_s[hit] + 0.075), t.size - 1), 1.0)
        v[i] += lfilter([1.0], [1.0, -a], kick)
    return Session(responses=Traces(v, t), sparse_noise=SparseNoise(sn.frames, sn.times_s, grid))


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--minutes", type=float, default=10.0)
    ap.add_argument("--cells", type=int, default=300)
    ap.add_argument("--rate-hz", type=float, default=10.0, help="mean background rate per cell")
    ap.add_argument("--step-s", type=float, default=1.0, help="recording time per read (default 1)")
    ap.add_argument("--json", type=Path, default=None, help="write the numbers here")
    ap.add_argument("--traces", action="store_true", help="imaging traces (traces.txt) instead of spikes")
    ap.add_argument("--decay", default="off", help="with --traces: the live --trace-decay (off or seconds)")
    args = ap.parse_args(argv)
    if hasattr(os, "sched_setaffinity") and len(os.sched_getaffinity(0)) > 2:
        os.sched_setaffinity(0, sorted(os.sched_getaffinity(0))[:2])
    session = (make_trace_session(args.minutes, args.cells) if args.traces
               else make_session(args.minutes, args.cells, args.rate_hz))
    n_spikes = session.responses.times_s.size if args.traces else session.responses.time_s.size
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp) / "rec"
        steps = replay_steps(session, folder, step_s=args.step_s)
        next(steps)
        fol = Follower(folder, trace_decay=args.decay if args.traces else "auto")
        update = cpu = 0.0
        snaps = []
        written = args.step_s
        while True:
            t0, c0 = time.perf_counter(), time.process_time()
            fol.poll()
            update += time.perf_counter() - t0
            cpu += time.process_time() - c0
            if written % 60.0 < args.step_s / 2 and written >= 60:
                t0 = time.perf_counter()
                res = fol.live.snapshot()
                suggest_aperture(res)
                snaps.append(time.perf_counter() - t0)
            try:
                written = next(steps)
            except StopIteration:
                break
        t0 = time.perf_counter()
        fol.poll()
        update += time.perf_counter() - t0
        res = fol.live.snapshot()
        sn = session.sparse_noise
        F = fol.onsets.size
        sp = session.responses
        if args.traces:                                # the replay writes samples from 1 s before the noise
            keep = (sp.times_s >= sn.times_s[0] - 1.0) & (sp.times_s < sn.frame_ends_s()[-1])
            sp = Traces(sp.values[:, keep], sp.times_s[keep])
            if args.decay != "off":
                from map2d.traces import decay_corrected
                sp, _ = decay_corrected(sp, float(args.decay), resmooth=False)
        off = compute_maps(sp, SparseNoise(sn.frames[:F], sn.times_s[:F], sn.grid), rng=0)
        worst = max(float(np.nanmax(np.abs(res.maps(k) - off.maps(k)))) / float(np.nanmax(np.abs(off.maps(k))))
                    for k in ("on", "off", "linear"))
    minutes = args.minutes
    out = {"minutes": minutes, "cells": args.cells, "responses": "traces" if args.traces else "spikes",
           ("samples" if args.traces else "spikes"): int(n_spikes), "frames": int(F),
           "lags": int(res.lags_s.size), "live_null_shifts": int(fol.live.n_null),
           "update_s_total": round(update, 3), "update_s_per_minute": round(update / minutes, 3),
           "update_cpu_s_per_minute": round(cpu / minutes, 3),
           "snapshot_s_median": round(float(np.median(snaps)), 3) if snaps else None,
           "cores": len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count(),
           "max_relative_difference_to_offline": worst}
    print(json.dumps(out, indent=2))
    print(f"update: {out['update_s_per_minute']:.3f} s per minute of data (target < 1 s; CPU time "
          f"{out['update_cpu_s_per_minute']:.3f} s, all threads); snapshot "
          f"{out['snapshot_s_median']} s; live vs offline maps differ by {worst:.1e} of the map range")
    if args.json:
        args.json.write_text(json.dumps(out, indent=2) + "\n", encoding="utf-8")
    if worst > 1e-4:
        raise SystemExit("live maps differ from the offline maps")
    return out


if __name__ == "__main__":
    main()
