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

from .errors import BadInput, raise_if_stopped

RESULTS_MARK = ".map2d-results"


#: Bytes that temporary siblings add to ``--out``'s name (``.NAME.partial-PID-XXXXXXXX``).
_SIBLING_EXTRA = 32


def _name_max(folder) -> int:
    try:
        return int(os.pathconf(folder, "PC_NAME_MAX"))
    except (OSError, ValueError, AttributeError):
        return 255


def results_target(out) -> Path:
    """Where the results of ``--out`` go, checked before any work: ``out`` itself, or the folder a
    symbolic link ``out`` points to (the link is kept).

    Refused (:class:`BadInput`, exit 2): a name too long for the file system once the temporary
    siblings' suffix is added, a link loop, an existing file, and a non-empty folder without the
    ``.map2d-results`` mark (a mistyped ``--out`` never deletes a user's other files).
    """
    out = Path(os.path.abspath(out))
    dest = Path(os.path.realpath(out)) if os.path.islink(out) else out
    if os.path.islink(dest):
        raise BadInput(out, "--out", "is a symbolic link that never reaches a folder (a loop)")
    name = os.fsencode(dest.name)
    parent = dest.parent
    limit = _name_max(parent if parent.is_dir() else "/") - _SIBLING_EXTRA
    if len(name) > limit:
        raise BadInput(out, "--out", f"its name is {len(name)} bytes long; at most {limit} fit beside the "
                                     f"temporary folders")
    if dest.exists():
        if not dest.is_dir():
            raise BadInput(out, "--out", "exists and is not a folder")
        if any(dest.iterdir()) and not (dest / RESULTS_MARK).exists():
            raise BadInput(out, "--out", "is a non-empty folder not written by map2d; choose another")
    return dest


def _lock(fd, block=True) -> bool | None:
    """flock ``fd`` exclusively: True when held, False when another process holds it (non-blocking),
    None where the file system has no locks (then callers fall back to process ids)."""
    try:
        import fcntl
        fcntl.flock(fd, fcntl.LOCK_EX | (0 if block else fcntl.LOCK_NB))
        return True
    except BlockingIOError:
        return False
    except (OSError, ImportError):
        return None


def _pid_alive(pid) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:
        return True
    return True


def _exchange(a, b) -> bool:
    """Swap the two paths atomically (Linux ``renameat2(RENAME_EXCHANGE)``); False where unsupported."""
    import sys
    if not sys.platform.startswith("linux"):
        return False
    try:
        import ctypes
        libc = ctypes.CDLL(None, use_errno=True)
        fn = libc.renameat2
    except (OSError, AttributeError):
        return False
    fn.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
    at_fdcwd, rename_exchange = -100, 2
    if fn(at_fdcwd, os.fsencode(a), at_fdcwd, os.fsencode(b), rename_exchange) == 0:
        return True
    err = ctypes.get_errno()
    import errno
    if err in (errno.EINVAL, errno.ENOSYS, errno.ENOTSUP, errno.EOPNOTSUPP):
        return False
    raise OSError(err, os.strerror(err), os.fsdecode(a))


def _clean_stale(dest: Path) -> None:
    """Remove temporary siblings of ``dest`` left by dead runs: ``.NAME.partial-*`` folders that no live
    run holds locked (or, without locks, whose process id is gone or is ours), and ``.NAME.old-*``
    folders (earlier results already replaced). If a run died between its two renames (``dest``
    missing, an ``old`` folder left), the newest ``old`` folder is put back as ``dest``. Call with the
    parent folder locked."""
    parent = dest.parent
    prefixes = (f".{dest.name}.partial-", f".{dest.name}.old-")
    try:
        entries = [e for e in os.scandir(parent) if e.name.startswith(prefixes)
                   and e.is_dir(follow_symlinks=False)]
    except OSError:
        return
    olds = []
    for e in entries:
        if e.name.startswith(prefixes[1]):
            olds.append(Path(e.path))
            continue
        try:
            fd = os.open(e.path, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0) | getattr(os, "O_NOFOLLOW", 0))
        except OSError:
            continue
        try:
            held = _lock(fd, block=False)
            if held is None:                       # no locks here: judge by the process id
                try:
                    pid = int(e.name[len(prefixes[0]):].split("-")[0])
                except ValueError:
                    continue
                if pid != os.getpid() and _pid_alive(pid):
                    continue
            elif not held:                         # a live run is writing there
                continue
            shutil.rmtree(e.path, ignore_errors=True)
        finally:
            os.close(fd)
    if olds and not os.path.lexists(dest):
        newest = max(olds, key=lambda p: p.stat().st_mtime)
        with contextlib.suppress(OSError):
            os.rename(newest, dest)
            olds.remove(newest)
    for old in olds:
        shutil.rmtree(old, ignore_errors=True)


@contextlib.contextmanager
def _parent_locked(parent: Path):
    """Hold an exclusive lock on the folder ``parent`` (best effort: none where unsupported)."""
    try:
        fd = os.open(parent, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    except OSError:
        fd = None
    try:
        if fd is not None:
            _lock(fd)
        yield
    finally:
        if fd is not None:
            os.close(fd)


@contextlib.contextmanager
def results_folder(out, mark=True):
    """Yield a temporary folder beside ``out``; on success it replaces ``out`` atomically.

    An existing ``out`` is replaced only if it is empty or was written by map2d (it holds the
    ``.map2d-results`` mark; ``mark=False`` skips both the mark and that check, for callers that
    check themselves). On any error the temporary folder is removed and ``out`` is left untouched.

    - A symbolic link ``out`` stays a link: the results replace the folder it points to.
    - The folder gets the permissions the umask allows (not the private mode of a temporary folder).
    - Temporary siblings (``.NAME.partial-PID-XXXXXXXX``) are locked while in use; those of dead runs
      are removed by the next run (:func:`_clean_stale`).
    - The swap is one atomic exchange where the system offers it (Linux ``renameat2``), else two
      renames; either way under a lock on the parent folder, so concurrent runs into the same
      ``out`` never fail and never leave mixed or orphaned folders: the last one to finish wins.
    - A full disk or a missing permission is refused (:class:`map2d.errors.BadEnvironment`, exit 2)
      naming the path.
    """
    from .errors import environment_error
    dest = results_target(out) if mark else _plain_target(out)
    parent = dest.parent
    fd = None
    try:
        parent.mkdir(parents=True, exist_ok=True)
        with _parent_locked(parent):         # no other run cleans between mkdtemp and the lock
            _clean_stale(dest)
            tmp = Path(tempfile.mkdtemp(prefix=f".{dest.name}.partial-{os.getpid()}-", dir=parent))
            try:                             # lock it: marks the folder as in use for _clean_stale
                fd = os.open(tmp, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
                _lock(fd, block=False)
            except OSError:                  # no folder handles here (Windows): process ids only
                pass
    except OSError as exc:
        if fd is not None:
            os.close(fd)
        raise (environment_error(exc, parent) or exc) from None
    try:
        os.chmod(tmp, 0o777 & ~_umask())     # mkdtemp makes it private; results are shared
        yield tmp
        raise_if_stopped()                   # never move results into place after a SIGTERM
        if mark:
            (tmp / RESULTS_MARK).write_text("written by map2d\n", encoding="utf-8")
        replaced = _swap_into_place(tmp, dest, check=mark)
        if replaced is not None:
            shutil.rmtree(replaced, ignore_errors=True)
    except BaseException as exc:
        errno_, reason = getattr(exc, "errno", None), getattr(exc, "strerror", None)
        if isinstance(exc, OSError) and errno_ is None and _disk_full(parent):
            import errno                          # e.g. numpy's "N requested and M written"
            errno_, reason = errno.ENOSPC, os.strerror(errno.ENOSPC)
        shutil.rmtree(tmp, ignore_errors=True)
        if isinstance(exc, OSError):             # name the results' path, not the temporary one
            name = os.fsdecode(exc.filename) if exc.filename is not None else str(dest)
            if name.startswith(str(tmp)):
                name = str(dest) + name[len(str(tmp)):]
            env = environment_error(OSError(errno_, reason, name), dest)
            if env is not None:
                raise env from None
        raise
    finally:
        if fd is not None:
            os.close(fd)


def _disk_full(folder) -> bool:
    """Whether the file system of ``folder`` has (almost) no space left: under 1 MiB or 0.1 % free."""
    try:
        use = shutil.disk_usage(folder)
    except OSError:
        return False
    return use.free < max(2 ** 20, 0.001 * use.total)


def _umask() -> int:
    umask = os.umask(0o022)
    os.umask(umask)
    return umask


def _plain_target(out) -> Path:
    """``out`` (or a symbolic link's target) with only the name-length check (see :func:`results_target`)."""
    out = Path(os.path.abspath(out))
    dest = Path(os.path.realpath(out)) if os.path.islink(out) else out
    limit = _name_max(dest.parent if dest.parent.is_dir() else "/") - _SIBLING_EXTRA
    if len(os.fsencode(dest.name)) > limit:
        raise BadInput(out, None, f"its name is {len(os.fsencode(dest.name))} bytes long; at most {limit} fit")
    return dest


def _swap_into_place(tmp: Path, dest: Path, check: bool) -> Path | None:
    """Put the finished folder ``tmp`` at ``dest`` (under the parent's lock); return the folder now
    holding the replaced results (to delete), or None."""
    import secrets
    for _ in range(20):
        with _parent_locked(dest.parent):
            if os.path.lexists(dest):
                if check:
                    results_target(dest)           # still ours to replace (another writer may have won)
                elif not dest.is_dir() or dest.is_symlink():
                    raise BadInput(dest, None, "exists and is not a folder")
                if _exchange(tmp, dest):
                    return tmp                        # tmp now holds the earlier results
                old = dest.parent / f".{dest.name}.old-{os.getpid()}-{secrets.token_hex(4)}"
                os.rename(dest, old)
                try:
                    os.rename(tmp, dest)
                except BaseException:
                    os.rename(old, dest)
                    raise
                return old
            try:
                os.rename(tmp, dest)
                return None
            except OSError as exc:                    # created meanwhile by a writer without locks
                import errno
                if exc.errno not in (errno.EEXIST, errno.ENOTEMPTY):
                    raise
    raise BadInput(dest, None, "is being replaced by other runs all the time; try again")


def run_stimulus(args) -> int:
    """``map2d stimulus sparse-noise|gratings``: seeded stimulus files (and rendered frames) in ``--out``.

    Adds to ``--out`` (:func:`map2d.contract.add_stimulus`): ``sparse_noise.npy`` +
    ``sparse_noise_times.npy``, or grating rows appended to ``gratings.csv`` (the files a session
    uses), and rewrites ``stimulus.json`` and the stimulus part of ``session.json`` (grid, phase origin,
    the generator calls in order); with ``--render`` also ``frames.tif``, frames ``--render-start`` ..
    ``+ --render-frames`` at display resolution, with frame rate and degrees per pixel in its metadata.
    An existing sparse noise or ``frames.tif`` is refused, and gratings are appended rather than
    replaced, unless ``--overwrite``; blocks that overlap in time are refused. Nothing is changed on a
    refusal. Bad arguments raise :class:`BadInput`.
    """
    import math

    import numpy as np

    from .contract import add_stimulus
    from .geometry import Display, Grid
    from .stimuli import render as rnd
    from .stimuli.gratings import make_drifting_gratings, make_flashed_gratings
    from .stimuli.sparse_noise import make_sparse_noise

    kind = args.stimulus_kind
    info = {"command": f"stimulus {kind}"}
    for k, v in sorted(vars(args).items()):
        if k in ("command", "stimulus_kind", "debug", "quiet", "out", "overwrite") or callable(v):
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
    ap = getattr(args, "aperture_deg", None)
    if ap is not None and not (all(math.isfinite(v) for v in ap) and ap[2] > 0):
        raise BadInput("--aperture-deg", None, f"needs a finite centre and a positive diameter, got {list(ap)}")
    try:
        sparse, table = None, None
        if kind == "sparse-noise":
            grid = Grid(ny=args.ny, nx=args.nx, center_x_deg=args.center_deg[0], center_y_deg=args.center_deg[1],
                        dx_deg=args.spacing_deg[0], dy_deg=args.spacing_deg[1])
            sparse = make_sparse_noise(grid, duration_s=args.minutes * 60.0, rate_hz=args.rate_hz,
                                       spots_per_frame=args.spots, min_distance_deg=args.min_distance_deg,
                                       start_s=args.start_s, rng=args.seed)
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
            frames = rnd.render_gratings(table, display, times, scale=args.render_scale,
                                         aperture_deg=getattr(args, "aperture_deg", None))
        info["rendered"] = {"file": rnd.FRAMES_FILE, "first_frame": int(first), "frames": int(frames.shape[0]),
                            "scale": int(args.render_scale), "shape": list(frames.shape),
                            "times_s": [float(t) for t in times]}
    files = {}
    if frames is not None:
        rate = args.rate_hz if sparse is not None else args.render_rate_hz
        files[rnd.FRAMES_FILE] = lambda path: rnd.write_frames_tiff(
            path.parent, frames, name=path.name, rate_hz=rate, display=display, scale=args.render_scale,
            times_s=times)
    with results_folder(args.out) as tmp:      # a copy of --out with the block added replaces it atomically
        _copy_folder(args.out, tmp)
        written = add_stimulus(tmp, sparse_noise=sparse, gratings=table, display=display, info=info,
                               overwrite=bool(getattr(args, "overwrite", False)), files=files)
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


def _copy_folder(src, dst) -> None:
    """Copy the files and folders of ``src`` (if it is a folder) into the existing folder ``dst``."""
    src = Path(src)
    if not src.is_dir():
        return
    for p in src.iterdir():
        if p.name == RESULTS_MARK:
            continue
        if p.is_dir() and not p.is_symlink():
            shutil.copytree(p, dst / p.name, symlinks=True)
        else:
            shutil.copy2(p, dst / p.name, follow_symlinks=False)


def run_simulate(args) -> int:
    """``map2d simulate OUT``: a simulated session folder and ``OUT.truth.json`` beside it.

    Uses ``args.out``, ``args.seed``, ``args.cells``, ``args.minutes``, ``args.responses``,
    ``args.overwrite`` (and ``args.quiet`` when present). The session is written into a temporary
    folder beside ``OUT`` and renamed into place only when complete; the truth (model parameters and
    true tuning of every cell, see :func:`map2d.simulate.simulate_session`) goes to
    ``OUT.truth.json``, outside the session folder so that analysis never sees it. An existing
    non-empty ``OUT`` is refused unless ``--overwrite``. The same seed gives byte-identical files.
    """
    import json
    import math

    from .contract import write_session
    from .simulate import simulate_session

    if int(args.cells) < 1:
        raise BadInput("--cells", None, f"must be at least 1, got {args.cells}")
    if not (math.isfinite(args.minutes) and args.minutes > 0):
        raise BadInput("--minutes", None, f"must be a positive number, got {args.minutes}")
    if args.responses not in ("spikes", "traces"):
        raise BadInput("--responses", None, f"must be spikes or traces, got {args.responses}")
    out = Path(args.out).absolute()
    truth_path = Path(str(out) + ".truth.json")
    if out.exists():
        if not out.is_dir():
            raise BadInput(out, None, "exists and is not a folder")
        if any(out.iterdir()) and not args.overwrite:
            raise BadInput(out, None, "is a non-empty folder; choose another or use --overwrite")
    if truth_path.exists() and not truth_path.is_file():
        raise BadInput(truth_path, None, "exists and is not a file")
    session, truth = simulate_session(n_cells=int(args.cells), minutes=float(args.minutes),
                                      responses=args.responses, seed=int(args.seed))
    if args.responses == "traces":  # imaging: a field of view with one ROI per cell
        from .simulate import roi_label_image
        session.rois = roi_label_image(session.cell_ids, rng=int(args.seed))
        session.roi_label_offset = 1
    text = json.dumps(truth, indent=2, allow_nan=False) + "\n"
    import secrets
    tmp_truth = out.parent / f".{truth_path.name}.partial-{os.getpid()}-{secrets.token_hex(4)}"
    try:
        with results_folder(out, mark=False) as tmp:
            write_session(tmp, session)
            tmp_truth.write_text(text, encoding="utf-8")
        os.replace(tmp_truth, truth_path)
    except BaseException:
        tmp_truth.unlink(missing_ok=True)
        raise
    if not getattr(args, "quiet", False):
        kinds = {}
        for c in truth["cells"]:
            kinds[c["kind"]] = kinds.get(c["kind"], 0) + 1
        summary = ", ".join(f"{n} {k}" for k, n in kinds.items())
        print(f"map2d: wrote {out} ({summary}; {args.responses}) and {truth_path.name}")
    return 0


def _trace_decay_option(value):
    """``--trace-decay`` checked: 'auto', 'off' or a positive number of seconds (else BadInput)."""
    from .traces import parse_trace_decay
    try:
        return parse_trace_decay(value)
    except ValueError as exc:
        raise BadInput("--trace-decay", None, str(exc)) from None


def _check_max_lag(max_lag_s, sn) -> None:
    """``--max-lag`` against the sparse noise ``sn`` (None: only the sign): at most a quarter of the
    frames, so that the shuffles have room (BadInput naming both otherwise)."""
    import math
    if not (math.isfinite(max_lag_s) and max_lag_s >= 0):
        raise BadInput("--max-lag", None, f"must be >= 0 seconds, got {max_lag_s}")
    if sn is not None and not (max_lag_s / sn.frame_interval_s < sn.n_frames / 4):
        raise BadInput("--max-lag", None, f"{max_lag_s} s is too long for {sn.n_frames} sparse-noise frames "
                                          f"of {sn.frame_interval_s:.4g} s (at most a quarter of them)")


def _drift_latency_option(value):
    """``--drift-latency`` checked: 'auto' or a number of seconds in [0, 1] (else BadInput)."""
    if value is None or value == "auto":
        return "auto"
    from .contract import parse_number
    try:
        v = parse_number(str(value))
    except ValueError:
        v = float("nan")
    if not (0.0 <= v <= 1.0):
        raise BadInput("--drift-latency", None, f"must be auto or seconds in [0, 1], got {value!r}")
    return v


def _dense_estimate_option(value):
    """``--dense-estimate`` checked: 'auto', 'sta' or 'whitened' (else BadInput)."""
    if value not in ("auto", "sta", "whitened"):
        raise BadInput("--dense-estimate", None, f"must be auto, sta or whitened, got {value!r}")
    return value


def run_assemble(folder, frame_times=None, spikes=None, traces=None, trace_times=None, rois=None, name=None,
                 overwrite=False, quiet=False) -> int:
    """``map2d assemble``: :func:`map2d.assemble.assemble_session`, then say what was matched."""
    from .assemble import assemble_session

    path, timing = assemble_session(folder, frame_times=frame_times, spikes=spikes, traces=traces,
                                    trace_times=trace_times, rois=rois, name=name, overwrite=overwrite)
    if not quiet:
        if timing is None:
            print("map2d assemble: no --frame-times: the nominal stimulus times are used as they are "
                  "(stimulus and recording must share one clock)")
        else:
            print(f"map2d assemble: {timing.summary()}")
        print(f"map2d assemble: wrote {Path(path) / 'session.json'}; next: map2d analyze {path} --out RESULTS")
    return 0


def run_maps(session_path, out, max_lag_s=0.2, seed=0, quiet=False, fits=True, trace_decay="auto",
             config=None, dense_estimate="auto") -> int:
    """``map2d maps``: spatial maps and fits -> ``maps.npz`` and ``cells.csv``.

    ``maps.npz`` holds ``on, off, linear`` and ``on_z, off_z, linear_z`` (float32, cells x lags x ny x nx,
    row 0 at the top), ``lags_s``, ``cell_ids``, the grid (``grid_shape``, ``grid_center_deg``,
    ``grid_spacing_deg``), and per cell the fitted spatial map and the model (``spatial_maps``,
    ``model_maps``, NaN when not fitted). ``cells.csv`` has one row per cell sorted by id: ``cell,
    responsive, center_x_deg, center_y_deg, peak_lag_s`` (the centre of the fitted model's envelope),
    then the map statistics and the fit parameters (the columns of ``map2d analyze`` without the
    grating ones). Cells that are not responsive have empty values.

    With ``fits=False`` (``--no-fits``) only the maps and their statistics are computed: the centre
    is then the model-free centroid of the significant region around the peak pixel
    (:func:`map2d.maps.map_centroid_deg`), ``onoff_overlap`` the overlap of the moment ellipses of the
    ON and OFF lobes at half their maximum (:func:`map2d.maps.halfmax_overlaps`), and there are no fit
    columns.

    ``trace_decay`` ('auto', 'off' or seconds; ``--trace-decay``): for traces, the indicator decay
    removed before the maps (:func:`map2d.traces.decay_corrected`); spikes are never filtered.

    ``session_path`` and ``config`` are read as by :func:`run_analyze` (a session folder, one pointing
    at an NWB file, or an ``.nwb`` file with its mapping). ``dense_estimate`` ('auto', 'sta' or
    'whitened'; ``--dense-estimate``): the linear map's estimate for dense noise
    (:func:`map2d.maps.compute_maps`), named in ``cells.csv`` (``dense_estimate``,
    ``dense_ridge_penalty``) and in the printed note.
    """
    import dataclasses

    import numpy as np

    from .analysis import GRATING_ONLY_COLUMNS, analyze_session
    from .contract import write_table
    from .nwb import load_source

    trace_decay = _trace_decay_option(trace_decay)
    results_target(out)                       # refuse a bad --out before the work
    dense_estimate = _dense_estimate_option(dense_estimate)
    session = load_source(session_path, config)
    if session.sparse_noise is None:
        raise BadInput(_manifest_of(session_path, config), "sparse_noise",
                       "is missing (maps need a sparse-noise stimulus)")
    sn = session.sparse_noise
    _check_max_lag(max_lag_s, sn)
    if fits:
        an = analyze_session(dataclasses.replace(session, gratings=None), max_lag_s=max_lag_s, rng=seed,
                             trace_decay=trace_decay, dense_estimate=dense_estimate,
                             size_tuning=False)   # maps.npz and cells.csv do not hold it
        res, spatial, model = an.maps, an.spatial_maps, _model_maps(an).get("model_maps", an.model_maps)
        table = {k: v for k, v in an.cells.items() if k not in GRATING_ONLY_COLUMNS}
    else:
        from .contract import Traces
        from .maps import compute_maps, dense_columns, halfmax_overlaps, map_centroid_deg
        from .traces import decay_corrected
        responses, decay = session.responses, None
        if isinstance(responses, Traces):
            responses, decay = decay_corrected(responses, trace_decay, skip_s=sn.frame_interval_s,
                                               span_s=(sn.times_s[0], sn.frame_ends_s()[-1]))
        res = compute_maps(responses, sn, max_lag_s=max_lag_s, rng=seed, dense_method=dense_estimate)
        spatial = model = np.full((res.n_cells,) + res.grid.shape, np.nan, dtype=np.float32)
        centres = np.array([map_centroid_deg(res, c) for c in range(res.n_cells)], dtype=float)
        table = {"cell": res.cell_ids, "responsive": res.responsive, "center_x_deg": centres[:, 0],
                 "center_y_deg": centres[:, 1], "peak_lag_s": res.peak_lag_s, "p_value": res.p_value,
                 # no fitted subfields: the moment ellipses of the half-maximum lobes (SNR-independent)
                 "polarity": res.polarity, "onoff_overlap": halfmax_overlaps(res), "snr": res.snr}
        if decay is not None:
            table["trace_decay_tau_s"] = decay.tau_s
        if res.stimulus == "dense":
            table.update(dense_columns(res))
    g = res.grid
    with results_folder(out) as tmp:
        np.savez(  # not compressed: float maps shrink ~15 % for seconds of zlib on large sessions
            tmp / "maps.npz", on=res.on, off=res.off, linear=res.linear,
            on_z=res.on_z, off_z=res.off_z, linear_z=res.linear_z,
            lags_s=res.lags_s, cell_ids=res.cell_ids, unit=np.array(res.unit),
            grid_shape=np.array(g.shape), grid_center_deg=np.array([g.center_x_deg, g.center_y_deg]),
            grid_spacing_deg=np.array([g.dx_deg, g.dy_deg]),
            spatial_maps=spatial, model_maps=model)
        write_table(tmp / "cells.csv", table)
    if not quiet:
        print(f"map2d maps: {int(res.responsive.sum())} of {res.n_cells} cells responsive; "
              f"wrote {Path(out) / 'maps.npz'} and cells.csv")
        from .maps import dense_estimate_note
        if res.stimulus == "dense":
            print(f"map2d: note: {dense_estimate_note(res)}")
    return 0


def _manifest_of(session_path, config):
    """What a missing stimulus is named in: the NWB mapping, else the folder's session.json."""
    return Path(config) if config is not None else Path(session_path) / "session.json"


def run_gratings(session_path, out, max_lag_s=0.2, seed=0, quiet=False, config=None, drift_latency="auto",
                 trace_decay="auto") -> int:
    """``map2d gratings``: grating surfaces and tuning -> ``gratings.npz`` and ``cells.csv``.

    ``gratings.npz`` (cells sorted by id, ``cell_ids``): for a flashed sequence ``orientations_deg``,
    ``sfs_cpd``, ``phases_deg``, ``lags_s``, ``kx_cpd``/``ky_cpd`` (orientation x SF), the complex
    first harmonic at each cell's peak lag ``flashed_harmonic`` (cells x ori x SF, divided by contrast,
    phase referenced to the phase origin, :mod:`map2d.geometry` convention), ``flashed_phase_invariant``,
    the full time course ``flashed_harmonic_lags`` / ``flashed_phase_mean_lags`` (... x lag),
    ``flashed_mean`` (cells x ori x SF x phase x lag, minus blank), ``flashed_energy`` (cells x lag),
    ``flashed_peak_lag_s``, ``flashed_p_value``; for drifting trials ``directions_deg``,
    ``drift_sfs_cpd``, ``drift_tfs_hz``, ``f0_mean``, ``f0_sem``, ``f1_mean`` (complex), ``f1_sem``,
    ``f1_amp_mean``, ``n_trials`` (cells x direction x SF x TF), ``spontaneous``, ``drifting_p_value``.
    ``cells.csv`` holds :data:`map2d.fit.tuning.TUNING_COLUMNS`. ``session_path`` and ``config`` as for
    :func:`run_analyze`. ``trace_decay`` (traces only, ``--trace-decay``): the per-cell indicator decay
    removed from the traces before the flashed gratings and modelled in the drifting F1 and F0, estimated
    once as in ``map2d analyze`` (:func:`map2d.analysis.grating_trace_decay`); ``cells.csv`` then holds
    ``trace_decay_tau_s``.
    """
    import numpy as np

    from .analysis import grating_trace_decay
    from .contract import write_table
    from .fit.tuning import grating_tuning_columns
    from .gratings import analyze_drifting, analyze_flashed, has_drifting, has_flashed
    from .nwb import load_source

    results_target(out)                       # refuse a bad --out before the work
    drift_latency = _drift_latency_option(drift_latency)
    trace_decay = _trace_decay_option(trace_decay)
    session = load_source(session_path, config)
    manifest = _manifest_of(session_path, config)
    g = session.gratings
    if g is None:
        raise BadInput(manifest, "gratings", "is missing (this command needs grating presentations)")
    if not (has_flashed(g) or has_drifting(g)):
        raise BadInput(manifest, "gratings", "the table holds no gratings with contrast (only blanks)")
    if not (np.isfinite(max_lag_s) and max_lag_s >= 0):
        raise BadInput("--max-lag", None, f"must be >= 0 seconds, got {max_lag_s}")
    rng = np.random.default_rng(seed)
    # traces: one per-cell indicator decay for the flashed and the drifting gratings (as map2d analyze)
    flashed_responses, decay, cell_tau = grating_trace_decay(session.responses, trace_decay,
                                                             flashed=has_flashed(g))
    fl = analyze_flashed(flashed_responses, g, max_lag_s=max_lag_s, rng=rng) if has_flashed(g) else None
    if fl is not None:      # selectivity with the noise floor removed, and its intervals (as map2d analyze)
        from .analysis import flashed_noise
        noise = flashed_noise(flashed_responses, g, fl, max_lag_s, phase_mean=True)
        if noise is not None:
            fl.harmonic_noise_var, fl.phase_mean_noise_var = noise
    dr = (analyze_drifting(session.responses, g, latency_s=drift_latency, trace_tau_s=cell_tau)
          if has_drifting(g) else None)
    ids = np.asarray(session.cell_ids)
    order = np.argsort(ids, kind="stable")
    arrays = {"cell_ids": ids[order]}
    if fl is not None:
        arrays.update(
            orientations_deg=fl.orientations_deg, sfs_cpd=fl.sfs_cpd, phases_deg=fl.phases_deg,
            lags_s=fl.lags_s, kx_cpd=fl.kx_cpd, ky_cpd=fl.ky_cpd, frame_s=np.float64(fl.frame_s),
            flashed_harmonic=fl.harmonic_at_peak[order], flashed_phase_invariant=fl.phase_mean_at_peak[order],
            flashed_harmonic_lags=fl.harmonic[order], flashed_phase_mean_lags=fl.phase_mean[order],
            flashed_mean=fl.mean[order], flashed_blank_mean=fl.blank_mean[order],
            flashed_energy=fl.energy[order], flashed_peak_lag_s=fl.peak_lag_s[order],
            flashed_p_value=fl.p_value[order], condition_contrast=fl.condition_contrast)
    if dr is not None:
        arrays.update(
            directions_deg=dr.directions_deg, drift_sfs_cpd=dr.sfs_cpd, drift_tfs_hz=dr.tfs_hz,
            f0_mean=dr.f0_mean[order], f0_sem=dr.f0_sem[order], f1_mean=dr.f1_mean[order],
            f1_sem=dr.f1_sem[order], f1_amp_mean=dr.f1_amp_mean[order], n_trials=dr.n_trials[order],
            spontaneous=dr.spontaneous[order], drifting_p_value=dr.p_value[order],
            trial_window_s=dr.trial_window_s, drift_latency_s=dr.latency_s[order])
    columns = grating_tuning_columns(fl, dr, cell_ids=ids)
    if decay is not None:                     # rows sorted by cell id, as the tuning columns
        columns["trace_decay_tau_s"] = list(np.asarray(decay.tau_s, float)[order])
    with results_folder(out) as tmp:
        np.savez_compressed(tmp / "gratings.npz", **arrays)
        write_table(tmp / "cells.csv", columns)
    if not quiet:
        n_resp = int(np.sum(columns["grating_responsive"]))
        print(f"map2d gratings: {n_resp} of {ids.size} cells respond to gratings; "
              f"wrote {Path(out) / 'gratings.npz'} and cells.csv")
    return 0


class _StageBar:
    """A progress bar over analysis stages: silent with ``quiet`` or when stderr is not a terminal."""

    STAGES = ("maps", "fits", "flashed gratings", "drifting gratings", "tuning", "reconcile", "map quality",
              "table", "writing")

    def __init__(self, quiet):
        import sys

        from tqdm import tqdm
        # no monitor thread: a second thread keeps the tuning fits from using worker processes
        tqdm.monitor_interval = 0
        self.bar = tqdm(total=len(self.STAGES), disable=quiet or not sys.stderr.isatty(),
                        unit="stage", leave=False, bar_format="{desc:<20} {bar} {n_fmt}/{total_fmt}")

    def __call__(self, name):
        self.bar.set_description_str(name)
        self.bar.update(1)

    def close(self):
        self.bar.close()


def _model_maps(an) -> dict:
    """``{"model_maps": (C, ny, nx)}``: the accepted spatial model of each cell with a fitted linear map,
    NaN for the others (no model fitted to their linear map, or the fit was rejected); empty without maps."""
    import numpy as np

    if an.model_maps is None or an.map_kind is None:
        return {}
    fitted = np.asarray(an.map_kind) == "linear"
    if an.fields is not None:
        fitted &= np.asarray(an.fields.columns["center_method"]) == "model"
    fitted = fitted[:, None, None]
    return {"model_maps": np.where(fitted, an.model_maps, np.nan).astype(np.float32)}


def write_analysis(folder, analysis, session, report=True) -> list:
    """Write every result file of :func:`map2d.analysis.analyze_session` into ``folder``.

    Returns the paths written. The results contract: ``cells.csv``, ``maps.tif`` (ImageJ hyperstack
    TZCYX), plus ``maps.ome.tif``, ``results.npz`` (all arrays), ``fov.tif`` and PNGs (with ROIs) and
    ``report.html``.
    """
    import numpy as np

    from .contract import write_table
    folder = Path(folder)
    written = []
    write_table(folder / "cells.csv", analysis.cells)
    written.append(folder / "cells.csv")
    arrays = {"cell_ids": analysis.cell_ids}
    an = analysis
    if an.maps is not None:
        from .export.tiff import write_maps_ome_tiff, write_maps_tiff
        m = an.maps
        stack = np.stack([m.on, m.off, m.linear], axis=2).transpose(1, 0, 2, 3, 4)  # (L, C, K, ny, nx)
        stack = np.ascontiguousarray(stack, dtype=np.float32)
        write_maps_tiff(folder / "maps.tif", stack, m.grid, m.lags_s, m.cell_ids, unit_label=m.unit)
        write_maps_ome_tiff(folder / "maps.ome.tif", stack, m.grid, m.lags_s, m.cell_ids, unit_label=m.unit)
        written += [folder / "maps.tif", folder / "maps.ome.tif"]
        arrays.update(lags_s=m.lags_s, on=m.on, off=m.off, linear=m.linear, on_z=m.on_z, off_z=m.off_z,
                      linear_z=m.linear_z, peak_maps=an.peak_maps,
                      **_model_maps(an),
                      grid_center_deg=np.array([m.grid.center_x_deg, m.grid.center_y_deg]),
                      grid_spacing_deg=np.array([m.grid.dx_deg, m.grid.dy_deg]))
    if getattr(an, "space_time", None) is not None:          # space-time slices (map2d.spacetime)
        st = an.space_time
        arrays.update(st_slice_across=st.slice_across, st_slice_along=st.slice_along,
                      st_slice_positions_deg=st.slice_positions_deg, st_axis_deg=st.axis_deg)
    if an.flashed is not None:
        fl = an.flashed
        arrays.update(orientations_deg=fl.orientations_deg, sfs_cpd=fl.sfs_cpd, phases_deg=fl.phases_deg,
                      grating_lags_s=fl.lags_s, measured_h=an.measured_h,
                      phase_invariant=fl.phase_mean_at_peak, kx_cpd=fl.kx_cpd, ky_cpd=fl.ky_cpd)
    if an.predicted_h is not None:
        arrays["predicted_h"] = an.predicted_h
    if an.inverse is not None:
        arrays.update(map_from_gratings=an.inverse.from_gratings, map_band_limited=an.inverse.from_map)
    if an.size_disk is not None:
        arrays.update(size_radii_deg=an.size_radii_deg, size_disk=an.size_disk, size_annulus=an.size_annulus)
    if an.drifting is not None:
        dr = an.drifting
        arrays.update(directions_deg=dr.directions_deg, drift_sfs_cpd=dr.sfs_cpd, drift_tfs_hz=dr.tfs_hz,
                      f0_mean=dr.f0_mean, f0_sem=dr.f0_sem, f1_mean=dr.f1_mean, f1_sem=dr.f1_sem)
    np.savez(folder / "results.npz", **arrays)  # uncompressed: zlib cost seconds on big sessions
    written.append(folder / "results.npz")
    if session.rois is not None and an.maps is not None:
        from .export.fov import write_fov
        props = {k: np.asarray([np.nan if v is None else float(v) for v in an.cells[k]], float)
                 for k in ("center_x_deg", "center_y_deg", "pref_orientation_deg", "pref_sf_cpd",
                           "agreement", "responsive", "linear") if k in an.cells}
        written += write_fov(folder, session.rois, an.cell_ids, props,
                             label_offset=int(getattr(session, "roi_label_offset", 0)))
    if report:
        try:
            from .report.html import write_report
        except ImportError:  # the report module arrives with the outputs issue
            write_report = None
        if write_report is not None:
            written.append(write_report(folder, an, session))
    return written


def run_analyze(session_path, out, max_lag_s=0.2, seed=0, quiet=False, config=None, trace_decay="auto",
                dense_estimate="auto", drift_latency="auto") -> int:
    """``map2d analyze``: everything, the results contract, written atomically into ``out``.

    ``session_path`` is a session folder, a folder whose ``session.json`` points at an NWB file, or an
    ``.nwb`` file with its mapping ``config`` (see :func:`map2d.nwb.load_source`). ``trace_decay`` and
    ``dense_estimate``: see :func:`run_maps`.
    """
    from .analysis import analyze_session
    from .nwb import load_source
    trace_decay = _trace_decay_option(trace_decay)
    results_target(out)                       # refuse a bad --out before the work
    dense_estimate = _dense_estimate_option(dense_estimate)
    drift_latency = _drift_latency_option(drift_latency)
    trace_decay = _trace_decay_option(trace_decay)
    session = load_source(session_path, config)
    _check_max_lag(max_lag_s, session.sparse_noise)
    bar = _StageBar(quiet)
    try:
        analysis = analyze_session(session, max_lag_s=max_lag_s, rng=seed, progress=bar,
                                   trace_decay=trace_decay, dense_estimate=dense_estimate,
                                   drift_latency=drift_latency)
        bar("writing")
        with results_folder(out) as tmp:
            write_analysis(tmp, analysis, session)
    finally:
        bar.close()
    if not quiet:
        print(f"map2d: {analysis_summary(analysis)}; results in {Path(out)}")
        for note in analysis.notes:
            print(f"map2d: note: {note}")
        print(f"map2d: report: {Path(out) / 'report.html'}")
    return 0


def analysis_summary(analysis) -> str:
    """'24 cells, 20 responsive to sparse noise, 18 to gratings': what each stimulus found."""
    def count(name):
        return sum(1 for v in analysis.cells.get(name, []) if v is True)
    parts = []
    if analysis.maps is not None:
        parts.append(f"{count('responsive')} responsive to sparse noise")
    if analysis.flashed is not None or analysis.drifting is not None:
        parts.append(f"{count('grating_responsive')} {'to' if parts else 'responsive to'} gratings")
    return ", ".join([f"{len(analysis.cell_ids)} cells"] + parts)


def run_batch(sources, out, **kwargs) -> int:
    """``map2d batch``: :func:`map2d.batch.run_batch` (every session analyzed on a Dask cluster or in
    process, then ``sessions.csv``, ``population.png`` and ``batch.csv``)."""
    from .batch import run_batch as _run_batch
    return _run_batch(sources, out, **kwargs)


def run_watch(args) -> int:
    """``map2d watch DIR``: :func:`map2d.watch.watch_folder` with the command's options."""
    import math

    from .watch import watch_folder
    for name in ("idle_s", "poll_s", "refresh_s", "summary_s"):
        v = getattr(args, name)
        if not (math.isfinite(v) and v > 0):
            raise BadInput("--" + name.replace("_", "-"), None, f"must be a positive number of seconds, got {v}")
    if not (math.isfinite(args.max_lag_s) and args.max_lag_s >= 0):
        raise BadInput("--max-lag", None, f"must be >= 0 seconds, got {args.max_lag_s}")
    watch_folder(args.folder, out=args.out, page=args.page, max_lag_s=args.max_lag_s, seed=args.seed,
                 idle_s=args.idle_s, poll_s=args.poll_s, refresh_s=args.refresh_s, summary_s=args.summary_s,
                 cells=args.cells, fits=not args.no_fits, quiet=args.quiet,
                 trace_decay=_trace_decay_option(args.trace_decay))
    return 0


def _fmt_num(v, nd=1):
    import math
    return "" if v is None or (isinstance(v, float) and not math.isfinite(v)) else f"{v:.{nd}f}"


def run_plan(args) -> int:
    """``map2d plan``: the planner (:mod:`map2d.plan`); prints, and with SESSION and ``--out`` writes the
    per-cell table as CSV (written whole after everything was computed)."""
    import numpy as np

    from . import plan
    if args.session is None:
        missing = [n for n in ("cell_rate_hz", "field_sd_deg", "peak_hz") if getattr(args, n) is None]
        if missing:
            raise BadInput("map2d plan", None, "without SESSION give the cell: " +
                           ", ".join("--" + n.replace("_", "-") for n in missing))
        try:
            pr = plan.NoiseProtocol(args.ny, args.nx, args.spacing_deg[0], args.spacing_deg[1], args.spots,
                                    args.rate_hz)
            cell = plan.PlannedCell(args.cell_rate_hz, args.field_sd_deg, args.peak_hz, args.latency_s,
                                    args.temporal_sd_s)
            out = plan.predict_sparse_noise(pr, cell, args.minutes)
        except ValueError as exc:
            raise BadInput("map2d plan", None, str(exc)) from None
        z, csd = float(out["z"]), float(out["center_sd_deg"])
        print(f"after {args.minutes:g} min: peak z {z:.1f} (spot response {float(out['spot_response_hz']):.1f} "
              f"spikes/s, map noise sd {float(out['map_sd_hz']):.2f}); centre sd {csd:.2f} deg per coordinate")
        print(f"minutes for z {args.target_z:g}: {float(plan.minutes_for_z(z, args.minutes, args.target_z)):.1f}")
        if args.target_center_deg is not None:
            print(f"minutes for a centre sd of {args.target_center_deg:g} deg: "
                  f"{args.minutes * (csd / args.target_center_deg) ** 2:.1f}")
        if args.target_snr is not None:
            w = plan.temporal_shares(1.0 / args.flashed_rate_hz, args.latency_s, args.temporal_sd_s)
            n = plan.flashed_presentations(args.cell_rate_hz, args.peak_hz / 2.0, args.target_snr, args.phases,
                                           args.contrast, args.flashed_rate_hz, w, args.variance_factor)
            print(f"flashed gratings: {float(n):.1f} presentations per condition for |H| SNR {args.target_snr:g}")
        return 0
    from .contract import write_table
    from .nwb import load_source
    session = load_source(args.session)
    res = plan.plan_session(session, args.target_z, max_lag_s=args.max_lag_s, target_snr=args.target_snr,
                            rng=args.seed)
    t, pop = res["cells"], res["population"]
    if not args.quiet:
        names = [k for k in ("cell", "responsive", "z_now", "minutes_needed", "minutes_more", "snr_now",
                             "presentations_needed") if k in t]
        print("  ".join(f"{n:>12}" for n in names))
        for i in range(len(t["cell"])):
            print("  ".join(f"{(_fmt_num(t[n][i]) if n not in ('cell', 'responsive') else str(t[n][i])):>12}"
                            for n in names))
    if "responsive" in pop:
        print(f"population: {pop['responsive']} of {pop['cells']} cells responsive after "
              f"{pop['minutes_now']:.1f} min, {pop['reached']} at z >= {args.target_z:g}"
              + ("" if pop["responsive"] == 0 else
                 f"; {pop['minutes_more_for_50pct_of_responsive']:.1f} more min bring half of the responsive "
                 f"cells there, {pop['minutes_more_for_90pct_of_responsive']:.1f} more min 90 %"))
    if "target_snr" in pop:
        need = np.asarray(t["presentations_needed"], float)
        fin = need[np.isfinite(need)]
        print(f"flashed gratings: {pop['presentations_now']:.1f} presentations per condition now, "
              f"{pop['snr_reached']} cells at |H| SNR >= {args.target_snr:g}"
              + (f"; median {np.median(fin):.1f} per condition needed" if fin.size else ""))
    if args.out is not None:
        out = Path(args.out)
        tmp = out.with_name(f".{out.name}.partial-{os.getpid()}")
        try:
            write_table(tmp, t)
            os.replace(tmp, out)
        except BaseException:
            tmp.unlink(missing_ok=True)
            raise
    return 0


DEMO_FOLDER = "data_demo"


def demo_session_path() -> Path:
    """The shipped demo session: ``data_demo/`` beside the package (a source checkout), else in the
    current folder."""
    for base in (Path(__file__).resolve().parent.parent, Path.cwd()):
        candidate = base / DEMO_FOLDER
        if (candidate / "session.json").is_file():
            return candidate
    raise BadInput(DEMO_FOLDER, None, "demo session not found (run from the map2d source folder)")


def run_demo(out, quiet=False) -> int:
    """``map2d demo``: analyze the shipped demo session and say where the report is."""
    import time
    t0 = time.perf_counter()
    session = demo_session_path()
    if not quiet:
        print(f"map2d: analyzing the demo session {session} (simulated; truth in "
              f"{session.parent / (session.name + '.truth.json')})")
    run_analyze(session, out, quiet=quiet)
    report = Path(out).absolute() / "report.html"
    print(f"map2d: done in {time.perf_counter() - t0:.1f} s; open {report}")
    return 0
