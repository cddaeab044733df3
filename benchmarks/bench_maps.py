"""Speed of ``map2d maps`` against two peers, measured in the same run on the same machine.

What is timed
-------------
- **map2d**: the whole ``map2d maps SESSION --out DIR --max-lag ...`` process (a subprocess: Python
  start-up, imports, loading and validating the session folder, maps, significance, writing), as users
  run it (model fits on: the default) and with ``--no-fits`` (maps only, what the peers compute).
- **fit stage**: :func:`map2d.fit.spatial.locate_fields` alone (which map carries each cell, the Gaussian,
  DoG and Gabor fits of every responsive cell, their checks, the ON/OFF subfield fits), in this process
  on the maps already computed.
- **per-cell peer**: the usual lab-script spike-triggered average, written here: for each cell, the
  frame of each spike, and for each lag the stimulus frames ``spike frame - lag`` gathered by fancy
  indexing, summed (weighted by 1/frame duration, i.e. in spikes/s) into ON and OFF sums.
- **dense peer**: one dense float32 matrix product over all cells per lag,
  ``(frames, 2 x pixels)^T x (frames, cells)``, i.e. ``(2P x F) @ (F x C*L)`` done lag by lag (same
  multiply-adds, without the lag-stacked copy of the responses), BLAS on both cores.

The peers run in this process on arrays already in memory (their loading is not timed, which favours
them). Each is repeated and the median is reported. All three produce the same quantity, checked
here to float32 tolerance: ``on[c, l, p]`` = mean rate of cell ``c`` in the frames ``l`` after a bright
spot at pixel ``p`` minus the cell's mean rate (``off`` the same for dark spots, ``linear = on - off``),
as written by ``map2d maps`` into ``maps.npz``.

Two populations are measured in the same run: today's session (two thirds of the cells respond) and
an all-responsive one (every cell driven, so every cell is fitted), ``--population`` to choose.

Options
-------
``--large`` the 1-hour, 500-cell, 32 x 32 session; ``--dense-gb G`` the peak resident memory of
``map2d maps`` on a float32 dense-noise movie of ``G`` GB (memory-mapped); ``--analyze`` the whole
``map2d analyze`` on a 1-hour, 500-cell session with both stimulus families, with stage timings.

Run ``python benchmarks/bench_maps.py --help``. The machine may be shared: medians, same run.
"""

from __future__ import annotations

import argparse
import json
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import scipy.sparse as sp

from map2d.contract import Session, SparseNoise, Spikes, write_session
from map2d.geometry import Grid
from map2d.stimuli.sparse_noise import make_sparse_noise

KINDS = ("on", "off", "linear")


# ----------------------------------------------------------------------------------------------
# a light session generator (linear-nonlinear-Poisson cells)
# ----------------------------------------------------------------------------------------------
POPULATIONS = {"session": 2 / 3, "all-responsive": 1.0}


def make_session(minutes=30.0, rate_hz=60.0, ny=24, nx=32, n_cells=300, spots=4, responsive_fraction=2 / 3,
                 rng=0) -> Session:
    """Sparse noise and Poisson spikes of model cells; a fraction respond, the rest fire at random.

    Responsive cells: Gaussian receptive field (ON, OFF or ON-OFF, sd 1-2.5 pixels), latency 1-4
    frames, rate = baseline + gain * max(drive, 0) with baseline 1-10 spikes/s and gain lognormal
    around 20 spikes/s (some cells weak, near the detection limit). Others: constant 1-10 spikes/s.
    """
    rng = np.random.default_rng(rng)
    grid = Grid(ny=ny, nx=nx, center_x_deg=0.0, center_y_deg=0.0, dx_deg=2.0, dy_deg=2.0)
    noise = make_sparse_noise(grid, duration_s=minutes * 60.0, rate_hz=rate_hz, spots_per_frame=spots,
                              min_distance_deg=5.0, rng=rng)
    F, P = noise.n_frames, ny * nx
    flat = noise.frames.reshape(F, P)
    r, c = np.nonzero(flat)
    on = flat[r, c] > 0
    B_on = sp.csr_matrix((np.ones(on.sum(), np.float32), (r[on], c[on])), shape=(F, P))
    B_off = sp.csr_matrix((np.ones((~on).sum(), np.float32), (r[~on], c[~on])), shape=(F, P))
    C = int(n_cells)
    resp = rng.random(C) < responsive_fraction
    rows, cols = np.indices((ny, nx))
    cy, cx = rng.uniform(0, ny - 1, C), rng.uniform(0, nx - 1, C)
    sd = rng.uniform(1.0, 2.5, C)
    g = np.exp(-((rows.ravel()[None] - cy[:, None]) ** 2 + (cols.ravel()[None] - cx[:, None]) ** 2)
               / (2 * sd[:, None] ** 2))                                   # (C, P)
    kind = rng.integers(0, 3, C)                                           # 0 ON, 1 OFF, 2 ON-OFF
    k_on = (g * (kind != 1)[:, None] * resp[:, None]).T.astype(np.float32)  # (P, C)
    k_off = (g * (kind != 0)[:, None] * resp[:, None]).T.astype(np.float32)
    drive = np.asarray(B_on @ k_on) + np.asarray(B_off @ k_off)            # (F, C)
    latency = rng.integers(1, 5, C)
    base = rng.uniform(1.0, 10.0, C).astype(np.float32)
    gain = (20.0 * np.exp(0.6 * rng.standard_normal(C))).astype(np.float32)
    rate = np.empty((F, C), np.float32)
    rate[:] = base
    for lat in np.unique(latency):
        m = latency == lat
        rate[lat:, m] += gain[m] * np.maximum(drive[:F - lat, m], 0)
    starts, ends = noise.times_s, noise.frame_ends_s()
    counts = rng.poisson(rate * (ends - starts)[:, None].astype(np.float32))
    frame, cell = np.nonzero(counts)
    reps = counts[frame, cell]
    frame, cell = np.repeat(frame, reps), np.repeat(cell, reps)
    t = starts[frame] + rng.random(frame.size) * (ends - starts)[frame]
    order = np.argsort(t, kind="stable")
    spikes = Spikes(time_s=t[order], cell=cell[order].astype(np.int64), cell_ids=np.arange(C))
    return Session(responses=spikes, sparse_noise=noise, name="bench")


# ----------------------------------------------------------------------------------------------
# the two peers
# ----------------------------------------------------------------------------------------------
def _spike_frames(noise: SparseNoise, spikes: Spikes):
    """Frame of each spike (-1 outside every frame) and the frame durations."""
    starts, ends = noise.times_s, noise.frame_ends_s()
    k = np.searchsorted(starts, spikes.time_s, side="right") - 1
    ok = k >= 0
    ok[ok] &= spikes.time_s[ok] < ends[k[ok]]
    return np.where(ok, k, -1), ends - starts


def peer_per_cell(noise: SparseNoise, spikes: Spikes, lags):
    """Per-cell spike-triggered average by fancy indexing -> on, off, linear (C, L, P) float32."""
    F = noise.n_frames
    flat = noise.frames.reshape(F, -1)
    P = flat.shape[1]
    k_all, dur = _spike_frames(noise, spikes)
    n_on = np.array([(flat[:F - lag] > 0).sum(0) for lag in lags], dtype=np.float64)   # (L, P)
    n_off = np.array([(flat[:F - lag] < 0).sum(0) for lag in lags], dtype=np.float64)
    C = spikes.cell_ids.size
    row = np.searchsorted(spikes.cell_ids, spikes.cell)
    on = np.empty((C, len(lags), P), np.float32)
    off = np.empty_like(on)
    order = np.argsort(row, kind="stable")                           # spikes grouped by cell
    bounds = np.searchsorted(row[order], np.arange(C + 1))
    # a regular frame rate (the usual case) lets the script count spikes; else weight each by 1/duration
    regular = np.ptp(dur) <= 1e-9 * dur.max()
    for c in range(C):
        k = k_all[order[bounds[c]:bounds[c + 1]]]
        k = k[k >= 0]
        w = 1.0 / dur[k]
        mean = w.sum() / F
        for li, lag in enumerate(lags):
            sel = k >= lag
            S = flat[k[sel] - lag]                                    # (spikes, P) int8, fancy indexing
            if regular:
                s_on = (S == 1).sum(axis=0) / dur[0]
                s_off = (S == -1).sum(axis=0) / dur[0]
            else:
                s_on, s_off = w[sel] @ (S == 1), w[sel] @ (S == -1)
            with np.errstate(invalid="ignore", divide="ignore"):
                on[c, li] = s_on / n_on[li] - mean
                off[c, li] = s_off / n_off[li] - mean
    return on, off, on - off


def peer_dense(noise: SparseNoise, spikes: Spikes, lags):
    """One dense float32 product over all cells per lag -> on, off, linear (C, L, P) float32."""
    F = noise.n_frames
    flat = noise.frames.reshape(F, -1)
    P = flat.shape[1]
    k, dur = _spike_frames(noise, spikes)
    row = np.searchsorted(spikes.cell_ids, spikes.cell)
    C = spikes.cell_ids.size
    ok = k >= 0
    R = np.bincount(k[ok] * C + row[ok], weights=1.0 / dur[k[ok]], minlength=F * C).reshape(F, C)
    R = R.astype(np.float32)
    mean = R.sum(0, dtype=np.float64) / F
    S = np.concatenate([flat > 0, flat < 0], axis=1).astype(np.float32)          # (F, 2P)
    on = np.empty((C, len(lags), P), np.float32)
    off = np.empty_like(on)
    for li, lag in enumerate(lags):
        Y = S[:F - lag].T @ R[lag:]                                            # (2P, C) BLAS
        n = S[:F - lag].sum(0, dtype=np.float64)
        with np.errstate(invalid="ignore", divide="ignore"):
            on[:, li] = (Y[:P] / n[:P, None]).T - mean[:, None]
            off[:, li] = (Y[P:] / n[P:, None]).T - mean[:, None]
    return on, off, on - off


# ----------------------------------------------------------------------------------------------
# running map2d as a user does
# ----------------------------------------------------------------------------------------------
def _cpu_children():
    u = resource.getrusage(resource.RUSAGE_CHILDREN)
    return u.ru_utime + u.ru_stime


def _map2d(args, env=None, cpu=None):
    """Run ``python -m map2d.cli ARGS`` (same as the ``map2d`` script); -> (seconds, peak RSS bytes or None).
    ``cpu``: a list that gets the CPU seconds of the process and of its forked children."""
    cmd = [sys.executable, "-m", "map2d.cli", *map(str, args)]
    t0 = time.perf_counter()
    before = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    c0 = _cpu_children()
    proc = subprocess.run(cmd, capture_output=True, text=True, env=env)
    dt = time.perf_counter() - t0
    if cpu is not None:
        cpu.append(_cpu_children() - c0)
    after = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    if proc.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd)} failed ({proc.returncode}):\n{proc.stdout}\n{proc.stderr}")
    # RUSAGE_CHILDREN holds the largest peak of any child so far: exact when it grew
    rss = after * 1024 if after > before else None
    return dt, rss, proc.stdout


def _max_lag_s(noise: SparseNoise, n_lags: int) -> float:
    """A --max-lag that gives exactly ``n_lags`` whole-frame lags (0 .. n_lags - 1)."""
    return (n_lags - 0.5) * noise.frame_interval_s


def compare_maps(npz_path, peer, label, rtol=1e-4):
    """Largest difference between map2d's maps.npz and a peer's maps, relative to the maps' range."""
    worst = 0.0
    with np.load(npz_path) as z:
        for kind, ref in zip(KINDS, peer):
            got = z[kind].reshape(ref.shape)
            if not np.array_equal(np.isnan(got), np.isnan(ref)):
                raise AssertionError(f"{label} {kind}: NaN pixels differ from map2d")
            scale = float(np.nanmax(np.abs(ref))) or 1.0
            worst = max(worst, float(np.nanmax(np.abs(got - ref))) / scale)
    if worst > rtol:
        raise AssertionError(f"{label}: maps differ from map2d by {worst:.2e} of their range (> {rtol})")
    return worst


def _median_time(fn, repeats, cpu=None):
    """Median wall time of ``fn()`` over repeats; ``cpu``: a list that gets each run's CPU time of this process
    (all its threads) and of children it waited for."""
    times, out = [], None
    for _ in range(repeats):
        t0, c0 = time.perf_counter(), time.process_time() + _cpu_children()
        out = fn()
        times.append(time.perf_counter() - t0)
        if cpu is not None:
            cpu.append(time.process_time() + _cpu_children() - c0)
    return float(np.median(times)), times, out


def _fit_stage(folder, max_lag, repeats):
    """Median seconds of :func:`map2d.fit.spatial.locate_fields` on the session's maps (computed here once)."""
    from map2d.contract import load_session
    from map2d.fit.spatial import locate_fields
    from map2d.maps import compute_maps

    s = load_session(folder)
    res = compute_maps(s.responses, s.sparse_noise, max_lag_s=max_lag, rng=0)
    cpu = []
    med, times, fields = _median_time(lambda: locate_fields(res), repeats, cpu)
    n_fit = int(np.sum(fields.columns["center_method"] != ""))
    return med, times, n_fit, float(np.median(cpu))


def bench_maps(workdir: Path, minutes, cells, ny, nx, n_lags, repeats, rate_hz=60.0, seed=0,
               skip_per_cell=False, quiet=False, responsive_fraction=2 / 3):
    """Generate, write, time map2d (default and --no-fits), its fit stage and the peers, check they agree.
    Returns a dict of results."""
    say = (lambda *a: None) if quiet else (lambda *a: print(*a, flush=True))
    t0 = time.perf_counter()
    session = make_session(minutes=minutes, rate_hz=rate_hz, ny=ny, nx=nx, n_cells=cells, rng=seed,
                           responsive_fraction=responsive_fraction)
    folder = workdir / "session"
    shutil.rmtree(folder, ignore_errors=True)
    write_session(folder, session)
    noise, spikes = session.sparse_noise, session.responses
    lags = list(range(n_lags))
    max_lag = _max_lag_s(noise, n_lags)
    say(f"session: {minutes:g} min at {rate_hz:g} Hz ({noise.n_frames} frames), {ny} x {nx} grid, "
        f"{cells} cells ({responsive_fraction:.0%} driven), {spikes.time_s.size} spikes, {n_lags} lags; "
        f"generated and written in {time.perf_counter() - t0:.1f} s")
    out = workdir / "maps_out"
    res = {"config": dict(minutes=minutes, rate_hz=rate_hz, ny=ny, nx=nx, cells=cells, lags=n_lags,
                          frames=int(noise.n_frames), spikes=int(spikes.time_s.size), repeats=repeats,
                          responsive_fraction=responsive_fraction)}
    args = ["maps", folder, "--out", out, "--max-lag", f"{max_lag:.9g}", "--quiet"]
    # the default command (model fits on) is what users wait for; --no-fits computes what the peers do
    m_times, f_times, m_cpu, f_cpu = [], [], [], []
    for _ in range(repeats):
        f_times.append(_map2d(args, cpu=f_cpu)[0])
        m_times.append(_map2d(args + ["--no-fits"], cpu=m_cpu)[0])
    res["map2d_with_fits"] = float(np.median(f_times))
    res["map2d"] = float(np.median(m_times))
    res["cpu"] = {"map2d_with_fits": float(np.median(f_cpu)), "map2d": float(np.median(m_cpu))}
    say(f"map2d maps (default, model fits on; whole process): median {res['map2d_with_fits']:.2f} s of "
        f"{['%.2f' % t for t in f_times]}")
    say(f"map2d maps --no-fits (whole process): median {res['map2d']:.2f} s of {['%.2f' % t for t in m_times]}")
    fit_med, fit_times, n_fit, fit_cpu = _fit_stage(folder, max_lag, repeats)
    res["fit_stage"], res["cells_fitted"], res["cpu"]["fit_stage"] = fit_med, n_fit, fit_cpu
    say(f"fit stage (locate_fields, {n_fit} responsive cells, in this process): median {fit_med:.2f} s of "
        f"{['%.2f' % t for t in fit_times]}")
    cpu = []
    d_med, d_times, dense = _median_time(lambda: peer_dense(noise, spikes, lags), repeats, cpu)
    res["dense"], res["cpu"]["dense"] = d_med, float(np.median(cpu))
    say(f"dense float32 product peer: median {d_med:.2f} s of {['%.2f' % t for t in d_times]}")
    res["dense_vs_map2d_max_rel_diff"] = compare_maps(out / "maps.npz", dense, "dense peer")
    del dense
    if not skip_per_cell:
        cpu = []
        p_med, p_times, per = _median_time(lambda: peer_per_cell(noise, spikes, lags), repeats, cpu)
        res["per_cell"], res["cpu"]["per_cell"] = p_med, float(np.median(cpu))
        say(f"per-cell numpy peer:        median {p_med:.2f} s of {['%.2f' % t for t in p_times]}")
        res["per_cell_vs_map2d_max_rel_diff"] = compare_maps(out / "maps.npz", per, "per-cell peer")
    with open(out / "cells.csv") as fh:
        res["responsive"] = sum(1 for line in fh.readlines()[1:] if line.split(",")[1] == "true")
    return res


def print_table(res, title=""):
    """Wall time (medians) and CPU time (all processes and threads; steadier on a shared machine)."""
    print()
    if title:
        print(title)
    cpu = res.get("cpu", {})
    print(f"{'method':36s} {'median s':>9s} {'CPU s':>7s} {'peer / default':>15s} {'peer / --no-fits':>17s}")
    for key, label in (("map2d_with_fits", "map2d maps (default, fits on)"), ("map2d", "map2d maps --no-fits"),
                       ("fit_stage", "  of the default: fit stage alone")):
        print(f"{label:36s} {res[key]:9.2f} {cpu.get(key, np.nan):7.2f}")
    for key, label in (("dense", "dense float32 product"), ("per_cell", "per-cell numpy STA")):
        if key in res:
            print(f"{label:36s} {res[key]:9.2f} {cpu.get(key, np.nan):7.2f} "
                  f"{res[key] / res['map2d_with_fits']:14.1f}x {res[key] / res['map2d']:16.1f}x")
    if "per_cell" in cpu and "map2d_with_fits" in cpu:
        print(f"(CPU-time ratios, per-cell / default {cpu['per_cell'] / cpu['map2d_with_fits']:.1f}x, "
              f"dense / default {cpu['dense'] / cpu['map2d_with_fits']:.1f}x)")
    print(f"(default / --no-fits: {res['map2d_with_fits'] / res['map2d']:.2f}x; maps agree: largest difference "
          f"{max(v for k, v in res.items() if k.endswith('rel_diff')):.1e} of the map range; "
          f"{res.get('responsive', '?')} of {res['config']['cells']} cells responsive, {res['cells_fitted']} fitted)")


# ----------------------------------------------------------------------------------------------
# dense noise larger than memory: peak resident memory of map2d maps
# ----------------------------------------------------------------------------------------------
def _peak_rss_of(args):
    """Run ``map2d ARGS`` under a fresh Python whose only child it is -> (seconds, peak RSS bytes)."""
    code = ("import resource, subprocess, sys, time; t = time.perf_counter(); "
            "r = subprocess.run([sys.executable, '-m', 'map2d.cli'] + sys.argv[1:]); "
            "print(time.perf_counter() - t, resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * 1024); "
            "sys.exit(r.returncode)")
    proc = subprocess.run([sys.executable, "-c", code, *map(str, args)], capture_output=True, text=True)
    if proc.returncode != 0:
        raise RuntimeError(f"map2d {' '.join(map(str, args))} failed:\n{proc.stdout}\n{proc.stderr}")
    dt, rss = proc.stdout.strip().splitlines()[-1].split()
    return float(dt), int(rss)


def bench_dense_memory(workdir: Path, gb: float, cells=20, ny=32, nx=32, rate_hz=60.0, n_lags=8, seed=0,
                       quiet=False):
    """Write a float32 binary white-noise movie of ``gb`` GB (memory-mapped, chunk by chunk) with
    linear-nonlinear-Poisson spikes, run ``map2d maps`` on it and measure its peak resident memory.
    The movie is deleted afterwards. Refuses when the disk lacks room for it (plus 1 GB)."""
    say = (lambda *a: None) if quiet else (lambda *a: print(*a, flush=True))
    P = ny * nx
    F = int(gb * 2**30 / (4 * P))
    need = F * P * 4 + 2**30
    free = shutil.disk_usage(workdir).free
    if free < need:
        raise SystemExit(f"--dense-gb {gb}: needs {need / 2**30:.1f} GB free in {workdir}, {free / 2**30:.1f} GB free")
    folder = workdir / "dense_session"
    shutil.rmtree(folder, ignore_errors=True)
    folder.mkdir(parents=True)
    rng = np.random.default_rng(seed)
    t0 = time.perf_counter()
    try:
        movie = np.lib.format.open_memmap(folder / "sparse_noise.npy", mode="w+", dtype=np.float32, shape=(F, ny, nx))
        rows, cols = np.indices((ny, nx))
        cy, cx = rng.uniform(0, ny - 1, cells), rng.uniform(0, nx - 1, cells)
        k = np.exp(-((rows.ravel()[None] - cy[:, None]) ** 2 + (cols.ravel()[None] - cx[:, None]) ** 2) / 4.0)
        k = (k * rng.choice([-1.0, 1.0], cells)[:, None]).T.astype(np.float32)        # (P, cells)
        drive = np.zeros((F, cells), np.float32)
        chunk = 16384
        for a in range(0, F, chunk):
            b = min(F, a + chunk)
            blk = np.where(rng.random((b - a, P), dtype=np.float32) < 0.5, np.float32(-1), np.float32(1))
            movie[a:b] = blk.reshape(-1, ny, nx)
            drive[a:b] = blk @ k
        movie.flush()
        del movie
        latency = 2
        rate = np.full((F, cells), 5.0, np.float32)
        rate[latency:] += 3.0 * np.maximum(drive[:F - latency], 0)
        counts = rng.poisson(rate / rate_hz)
        frame, cell = np.nonzero(counts)
        reps = counts[frame, cell]
        frame, cell = np.repeat(frame, reps), np.repeat(cell, reps)
        t = (frame + rng.random(frame.size)) / rate_hz
        order = np.argsort(t)
        np.save(folder / "sparse_noise_times.npy", np.arange(F) / rate_hz)
        np.savez(folder / "spikes.npz", time_s=t[order], cell=cell[order].astype(np.int64))
        manifest = {"sparse_noise": {"frames": "sparse_noise.npy", "times": "sparse_noise_times.npy",
                                     "grid": {"center_deg": [0.0, 0.0], "spacing_deg": [2.0, 2.0]}},
                    "responses": {"kind": "spikes", "file": "spikes.npz", "cell_ids": list(range(cells))}}
        (folder / "session.json").write_text(json.dumps(manifest, indent=2) + "\n")
        say(f"dense movie: {F} frames of {ny} x {nx} float32 = {F * P * 4 / 2**30:.2f} GB, {cells} cells, "
            f"written in {time.perf_counter() - t0:.1f} s")
        dt, rss = _peak_rss_of(["maps", folder, "--out", workdir / "dense_out",
                                "--max-lag", f"{(n_lags - 0.5) / rate_hz:.9g}", "--quiet"])
        say(f"map2d maps on the dense movie: {dt:.1f} s, peak resident memory {rss / 2**30:.2f} GB")
        return {"dense_gb": F * P * 4 / 2**30, "dense_frames": F, "dense_seconds": dt, "dense_peak_rss_gb": rss / 2**30}
    finally:
        shutil.rmtree(folder, ignore_errors=True)
        shutil.rmtree(workdir / "dense_out", ignore_errors=True)


# ----------------------------------------------------------------------------------------------
# the whole analysis
# ----------------------------------------------------------------------------------------------
def _children_cpu():
    r = resource.getrusage(resource.RUSAGE_CHILDREN)
    return r.ru_utime + r.ru_stime


def bench_analyze(workdir: Path, minutes=60.0, cells=500, ny=32, nx=32, seed=0, quiet=False):
    """Simulate a session with sparse noise and both grating families, time the whole ``map2d analyze``
    process (wall and CPU, its worker processes included), then the stages in this process: analysis
    stages from its progress calls (wall, and CPU of this process; the map-quality pass runs in a forked
    child during the grating stages, so its stage is only the wait for it), and the writing file by file
    (cells.csv, the TIFF stacks, results.npz, report.html)."""
    import map2d.contract
    import map2d.export.tiff
    import map2d.report.html
    from map2d.analysis import analyze_session
    from map2d.contract import load_session
    from map2d.pipeline import write_analysis
    from map2d.simulate import simulate_session

    say = (lambda *a: None) if quiet else (lambda *a: print(*a, flush=True))
    t0 = time.perf_counter()
    grid = Grid(ny=ny, nx=nx, center_x_deg=0.0, center_y_deg=0.0, dx_deg=2.0, dy_deg=2.0)
    session, _ = simulate_session(n_cells=cells, minutes=minutes, responses="spikes", seed=seed, grid=grid,
                                  sparse_rate_hz=60.0)
    folder = workdir / "analyze_session"
    shutil.rmtree(folder, ignore_errors=True)
    write_session(folder, session)
    say(f"analyze session: {minutes:g} min sparse noise at 60 Hz on {ny} x {nx}, {cells} cells, flashed and "
        f"drifting gratings; simulated in {time.perf_counter() - t0:.1f} s")
    out = workdir / "analyze_out"
    cpu0 = _children_cpu()
    total, _, _ = _map2d(["analyze", folder, "--out", out, "--quiet"])
    total_cpu = _children_cpu() - cpu0
    load = " ".join(f"{v:.1f}" for v in __import__("os").getloadavg())
    say(f"map2d analyze (whole process): {total:.1f} s wall, {total_cpu:.1f} s CPU with its workers "
        f"(load average {load})")
    stages, cpu = {}, {}
    marks = []
    t_load, c_load = time.perf_counter(), time.process_time()
    s = load_session(folder)
    stages["load"], cpu["load"] = time.perf_counter() - t_load, time.process_time() - c_load
    an = analyze_session(s, rng=0, progress=lambda name: marks.append((name, time.perf_counter(),
                                                                          time.process_time())))
    t_end, c_end = time.perf_counter(), time.process_time()
    for (name, t, c), (_, t_next, c_next) in zip(marks, marks[1:] + [("", t_end, c_end)]):
        stages[name], cpu[name] = t_next - t, c_next - c
    tmp = workdir / "analyze_write"
    shutil.rmtree(tmp, ignore_errors=True)
    tmp.mkdir()
    # the writers, timed where write_analysis looks them up
    writers = [(map2d.contract, "write_table", "cells.csv"), (map2d.export.tiff, "write_maps_tiff", "maps.tif"),
               (map2d.export.tiff, "write_maps_ome_tiff", "maps.ome.tif"), (np, "savez", "results.npz"),
               (map2d.report.html, "write_report", "report.html")]
    saved = [(mod, name, getattr(mod, name)) for mod, name, _ in writers]
    parts = {}

    def timed(fn, label):
        def run(*a, **k):
            t, c = time.perf_counter(), time.process_time()
            try:
                return fn(*a, **k)
            finally:
                w, u = parts.get(label, (0.0, 0.0))
                parts[label] = (w + time.perf_counter() - t, u + time.process_time() - c)
        return run

    try:
        for (mod, name, label), (_, _, fn) in zip(writers, saved):
            setattr(mod, name, timed(fn, label))
        t, c = time.perf_counter(), time.process_time()
        write_analysis(tmp, an, s)
        stages["writing"], cpu["writing"] = time.perf_counter() - t, time.process_time() - c
    finally:
        for mod, name, fn in saved:
            setattr(mod, name, fn)
    for label, (w, u) in parts.items():
        stages[f"  {label}"], cpu[f"  {label}"] = w, u
    report_mb = (tmp / "report.html").stat().st_size / 1e6
    shutil.rmtree(tmp, ignore_errors=True)
    say(f"  {'stage (this process)':30s} {'wall s':>8s} {'CPU s':>8s}")
    for name, dt in stages.items():
        say(f"  {name:30s} {dt:8.2f} {cpu[name]:8.2f}")
    say(f"  {'sum':30s} {sum(v for k, v in stages.items() if not k.startswith(' ')):8.2f} "
        f"{sum(v for k, v in cpu.items() if not k.startswith(' ')):8.2f}")
    say(f"report.html: {report_mb:.1f} MB for {cells} cells (every cell), {parts['report.html'][1]:.2f} s of CPU")
    return {"analyze_seconds": total, "analyze_cpu_seconds": total_cpu, "analyze_stages": stages,
            "analyze_stages_cpu": cpu, "report_mb": report_mb, "report_cpu_seconds": parts["report.html"][1]}


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--minutes", type=float, default=30.0)
    ap.add_argument("--rate-hz", type=float, default=60.0)
    ap.add_argument("--cells", type=int, default=300)
    ap.add_argument("--grid", type=int, nargs=2, default=(24, 32), metavar=("NY", "NX"))
    ap.add_argument("--lags", type=int, default=8)
    ap.add_argument("--large", action="store_true", help="the 1-hour, 500-cell, 32 x 32 session")
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--skip-per-cell", action="store_true", help="leave out the slow per-cell peer")
    ap.add_argument("--workdir", type=Path, default=None, help="where to write sessions (default: a temp folder)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--json", type=Path, default=None, help="also write the results here")
    ap.add_argument("--dense-gb", type=float, default=0.5,
                    help="size of the dense float32 movie for the memory measurement (0: skip; default 0.5)")
    ap.add_argument("--analyze", action="store_true",
                    help="also time the whole map2d analyze on a 1-hour, 500-cell session with both stimulus families")
    ap.add_argument("--only", choices=("maps", "dense", "analyze"), default=None, help="run one part only")
    ap.add_argument("--population", choices=("both",) + tuple(POPULATIONS), default="both",
                    help="today's session (two thirds of the cells driven), all cells driven, or both (default)")
    args = ap.parse_args(argv)
    if args.large:
        args.minutes, args.cells, args.grid = 60.0, 500, (32, 32)
    workdir = args.workdir or Path(tempfile.mkdtemp(prefix="map2d-bench-"))
    workdir.mkdir(parents=True, exist_ok=True)
    res = {}
    try:
        if args.only in (None, "maps"):
            pops = list(POPULATIONS) if args.population == "both" else [args.population]
            for i, pop in enumerate(pops):
                r = bench_maps(workdir, args.minutes, args.cells, args.grid[0], args.grid[1], args.lags,
                               args.repeats, rate_hz=args.rate_hz, seed=args.seed, skip_per_cell=args.skip_per_cell,
                               responsive_fraction=POPULATIONS[pop])
                print_table(r, f"{pop}:")
                if i == 0:
                    res.update(r)
                else:
                    res[pop] = r
        if args.dense_gb > 0 and args.only in (None, "dense"):
            res.update(bench_dense_memory(workdir, args.dense_gb, seed=args.seed))
        if args.analyze or args.only == "analyze":
            res.update(bench_analyze(workdir, seed=args.seed))
        if args.json:
            args.json.write_text(json.dumps(res, indent=2) + "\n")
    finally:
        if args.workdir is None:
            shutil.rmtree(workdir, ignore_errors=True)
    return res


if __name__ == "__main__":
    main()
