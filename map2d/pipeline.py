"""The stages in order, and the atomic results folder.

Each ``run_*`` function is what one CLI command does: load (through :mod:`map2d.contract`), compute
(through the topic modules), write into a temporary folder beside ``--out``, and move it into place
only when everything succeeded. A failed run leaves no partial folder and leaves earlier results
exactly as they were.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import tempfile
from pathlib import Path

from .errors import BadInput

RESULTS_MARK = ".map2d-results"


@contextlib.contextmanager
def results_folder(out):
    """Yield a temporary folder beside ``out``; on success it replaces ``out`` atomically.

    An existing ``out`` is replaced only if it is empty or was written by map2d (it holds the
    ``.map2d-results`` mark), so a mistyped ``--out`` never deletes a user's other files. On any
    error the temporary folder is removed and ``out`` is left untouched.
    """
    out = Path(out).absolute()
    if out.exists():
        if not out.is_dir():
            raise BadInput(out, "--out", "exists and is not a folder")
        if any(out.iterdir()) and not (out / RESULTS_MARK).exists():
            raise BadInput(out, "--out", "is a non-empty folder not written by map2d; choose another")
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.partial-", dir=out.parent))
    try:
        yield tmp
        (tmp / RESULTS_MARK).write_text("written by map2d\n", encoding="utf-8")
        old = None
        if out.exists():
            old = out.parent / f".{out.name}.old-{os.getpid()}"
            os.replace(out, old)
        os.replace(tmp, out)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def run_stimulus(args) -> int:
    """``map2d stimulus sparse-noise|gratings``: seeded stimulus files (and rendered frames) in ``--out``.

    Writes ``sparse_noise.npy`` + ``sparse_noise_times.npy`` or ``gratings.csv`` (the files a session
    uses) and ``stimulus.json`` (grid, phase origin, generator arguments); with ``--render`` also
    ``frames.tif``, frames ``--render-start`` .. ``+ --render-frames`` at display resolution. The folder
    is written atomically (see :func:`results_folder`). Bad arguments raise :class:`BadInput`.
    """
    import numpy as np

    from .contract import write_stimulus
    from .geometry import Display, Grid
    from .stimuli import render as rnd
    from .stimuli.gratings import make_drifting_gratings, make_flashed_gratings
    from .stimuli.sparse_noise import make_sparse_noise

    kind = args.stimulus_kind
    info = {"command": f"stimulus {kind}"}
    for k, v in sorted(vars(args).items()):
        if k in ("command", "stimulus_kind", "debug", "quiet", "out") or callable(v):
            continue
        info[k.replace("_", "-")] = list(v) if isinstance(v, (tuple, list)) else v
    display = None
    if args.render:
        w_cm, h_cm, w_px, h_px, dist = args.display
        if w_px != int(w_px) or h_px != int(h_px):
            raise BadInput("--display", "W_PX H_PX", f"must be whole pixels, got {w_px} {h_px}")
        try:
            display = Display(width_cm=w_cm, height_cm=h_cm, width_px=int(w_px), height_px=int(h_px),
                              distance_cm=dist, eye_x_cm=args.eye_cm[0], eye_y_cm=args.eye_cm[1])
        except ValueError as exc:
            raise BadInput("--display", None, str(exc)) from None
        for name in ("render_scale", "render_frames"):
            if getattr(args, name) < 1:
                raise BadInput("--" + name.replace("_", "-"), None, f"must be >= 1, got {getattr(args, name)}")
        if args.render_start < 0:
            raise BadInput("--render-start", None, f"must be >= 0, got {args.render_start}")
    try:
        sparse, table = None, None
        if kind == "sparse-noise":
            grid = Grid(ny=args.ny, nx=args.nx, center_x_deg=args.center_deg[0], center_y_deg=args.center_deg[1],
                        dx_deg=args.spacing_deg[0], dy_deg=args.spacing_deg[1])
            sparse = make_sparse_noise(grid, duration_s=args.minutes * 60.0, rate_hz=args.rate_hz,
                                       spots_per_frame=args.spots, min_distance_deg=args.min_distance_deg,
                                       rng=args.seed)
        elif args.mode == "flashed":
            if args.orientations < 1 or args.phases < 1:
                raise ValueError("--orientations and --phases must be >= 1")
            table = make_flashed_gratings(np.arange(args.orientations) * 180.0 / args.orientations, args.sf_cpd,
                                          np.arange(args.phases) * 360.0 / args.phases,
                                          duration_s=args.minutes * 60.0, rate_hz=args.rate_hz,
                                          blank_fraction=args.blank_fraction, contrast=args.contrast,
                                          phase_origin_deg=args.phase_origin_deg, start_s=args.start_s,
                                          rng=args.seed)
        else:
            if args.orientations < 1:
                raise ValueError("--orientations must be >= 1")
            table = make_drifting_gratings(np.arange(args.orientations) * 360.0 / args.orientations, args.sf_cpd,
                                           tf_hz=args.tf_hz, trial_s=args.duration_s, gap_s=args.gap_s,
                                           repeats=args.repeats, contrast=args.contrast,
                                           phase_origin_deg=args.phase_origin_deg, start_s=args.start_s,
                                           rng=args.seed)
    except ValueError as exc:
        raise BadInput(f"map2d stimulus {kind}", None, str(exc)) from None

    frames = None
    if display is not None:
        first, count = args.render_start, args.render_frames
        if sparse is not None:
            if first >= sparse.n_frames:
                raise BadInput("--render-start", None, f"must be below the {sparse.n_frames} frames")
            idx = np.arange(first, min(first + count, sparse.n_frames))
            frames = rnd.render_sparse_noise(sparse, display, frames=idx, scale=args.render_scale)
            times = sparse.times_s[idx]
        else:
            all_times = rnd.grating_frame_times(table, rate_hz=args.render_rate_hz)
            if first >= all_times.size:
                raise BadInput("--render-start", None, f"must be below the {all_times.size} frames")
            times = all_times[first:first + count]
            frames = rnd.render_gratings(table, display, times, scale=args.render_scale)
        info["rendered"] = {"file": rnd.FRAMES_FILE, "first_frame": int(first), "frames": int(frames.shape[0]),
                            "scale": int(args.render_scale), "shape": list(frames.shape),
                            "times_s": [float(t) for t in times]}
    with results_folder(args.out) as tmp:
        write_stimulus(tmp, sparse_noise=sparse, gratings=table, display=display, info=info)
        if frames is not None:
            rnd.write_frames_tiff(tmp, frames)
        written = sorted(p.name for p in tmp.iterdir())
    if not args.quiet:
        if sparse is not None:
            what = (f"{sparse.n_frames} sparse-noise frames of {sparse.grid.ny} x {sparse.grid.nx} "
                    f"at {args.rate_hz:g} Hz")
        else:
            what = f"{len(table)} {args.mode} grating presentations"
        print(f"map2d: wrote {what} to {args.out}: {', '.join(written)}")
        if frames is not None:
            print(f"map2d: rendered {frames.shape[0]} frames of {frames.shape[2]} x {frames.shape[1]} px "
                  f"into {rnd.FRAMES_FILE}")
    return 0


def run_simulate(args) -> int:
    """``map2d simulate ...``."""
    raise NotImplementedError("simulate command not built yet")


def run_maps(session_path, out, max_lag_s=0.2, seed=0, quiet=False) -> int:
    """``map2d maps``: spatial maps and fits -> ``maps.npz`` and ``cells.csv``."""
    raise NotImplementedError("maps command not built yet")


def run_gratings(session_path, out, max_lag_s=0.2, seed=0, quiet=False) -> int:
    """``map2d gratings``: grating surfaces and tuning -> ``gratings.npz`` and ``cells.csv``."""
    raise NotImplementedError("gratings command not built yet")


def run_analyze(session_path, out, max_lag_s=0.2, seed=0, quiet=False) -> int:
    """``map2d analyze``: everything, the results contract."""
    raise NotImplementedError("analyze command not built yet")


def run_demo(out, quiet=False) -> int:
    """``map2d demo``: analyze the shipped demo session."""
    raise NotImplementedError("demo command not built yet")
