"""Many sessions: ``map2d batch SESSION... --out DIR``, one ``analyze`` per session on a Dask cluster.

Each session is analyzed by :func:`analyze_one` (the work of ``map2d analyze``) in a worker process and
written atomically to ``DIR/<session name>/``; a failure in one session is recorded with its name and
does not stop the others. When every session has been tried, the combined tables and figure are written:

``DIR/sessions.csv``
    Every analyzed session's ``cells.csv``, one row per cell, with a ``session`` column first (sessions
    in the order given; columns in order of first appearance; a column a session lacks is empty).
``DIR/population.png``
    Agreement distribution, preferred orientations and receptive-field centres of all cells.
``DIR/batch.csv``
    One row per session: ``session, source, status`` (``ok``, ``bad input`` or ``error``), ``cells``,
    ``responsive``, ``seconds``, ``message``.

Where it runs (``scheduler``): ``None`` starts an embedded local cluster (worker processes on this
machine, one thread each, :data:`LOCAL_WORKERS` workers of :data:`LOCAL_MEMORY_LIMIT` each, so two fit a
24 GB machine); ``"tcp://HOST:PORT"`` uses a running ``dask.distributed`` scheduler (its workers must
have map2d installed and see the same file system); ``"sync"`` runs every session here, one after the
other, without Dask (for debugging).
"""

from __future__ import annotations

import os
import sys
import time
import traceback
import warnings
from pathlib import Path

from .errors import BadInput

__all__ = ["analyze_one", "find_sessions", "run_batch", "combine_tables", "population_figure",
           "LOCAL_WORKERS", "LOCAL_MEMORY_LIMIT", "BATCH_MARK"]

#: Workers of the embedded local cluster, and the memory limit of each (two fit a 24 GB machine).
LOCAL_WORKERS = 2
LOCAL_MEMORY_LIMIT = "10GB"
#: Mark file of a batch results folder (an existing ``DIR`` without it is refused unless empty).
BATCH_MARK = ".map2d-batch"
DISTRIBUTED_HINT = "running on a cluster needs the optional package dask.distributed: " \
                   "pip install 'map2d[distributed]' (or use --scheduler sync)"


def analyze_one(source, out, config=None, max_lag_s: float = 0.2, seed: int = 0, n_jobs: int = 1,
                report: bool = True, trace_decay="auto", dense_estimate="auto") -> dict:
    """Analyze one session into the results folder ``out`` (what ``map2d analyze`` writes).

    Runs in a batch worker; never raises for a session's own failure.

    Parameters
    ----------
    source : str or Path
        Session folder, folder whose ``session.json`` has an ``nwb`` key, or ``.nwb`` file.
    out : str or Path
        Results folder, replaced atomically on success (:func:`map2d.pipeline.results_folder`).
    config : str or Path or dict, optional
        NWB mapping for an ``.nwb`` source.
    max_lag_s, seed :
        As for ``map2d analyze``.
    n_jobs : int
        Processes for the model fits inside this session (1 in a batch: the sessions are the parallel
        units).
    report : bool
        Write ``report.html`` (the slowest file: figures); False leaves it out.
    trace_decay : "auto", "off" or float
        As ``--trace-decay`` of ``map2d analyze`` (imaging traces only).
    dense_estimate : "auto", "sta" or "whitened"
        As ``--dense-estimate`` of ``map2d analyze`` (dense noise only).

    Returns
    -------
    dict
        ``status`` (``"ok"``, ``"bad input"`` or ``"error"``), ``message`` (empty when ok),
        ``cells``, ``responsive``, ``seconds``, ``notes`` (input warnings and analysis notes),
        ``maps_estimate`` ('sparse', 'sta' or 'whitened'; empty without maps).
    """
    from .analysis import analyze_session
    from .contract import InputWarning
    from .nwb import load_source
    from .pipeline import results_folder, write_analysis

    t0 = time.perf_counter()
    result = {"status": "ok", "message": "", "cells": None, "responsive": None, "notes": [], "maps_estimate": ""}
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", InputWarning)   # kept in session.notes instead
            session = load_source(source, config)
            analysis = analyze_session(session, max_lag_s=max_lag_s, rng=seed, n_jobs=n_jobs,
                                       trace_decay=trace_decay, dense_estimate=dense_estimate)
            with results_folder(out) as tmp:
                write_analysis(tmp, analysis, session, report=report)
        result["cells"] = int(len(analysis.cell_ids))
        result["responsive"] = int(sum(1 for v in analysis.cells.get("responsive", []) if v is True))
        result["notes"] = [str(n) for n in list(session.notes) + list(analysis.notes)]
        result["maps_estimate"] = "" if analysis.maps is None else str(analysis.maps.method)
    except BadInput as exc:
        result.update(status="bad input", message=str(exc))
    except Exception as exc:  # noqa: BLE001 - one session's failure must not stop the batch
        tb = traceback.extract_tb(exc.__traceback__)
        where = f" (at {Path(tb[-1].filename).name}:{tb[-1].lineno})" if tb else ""
        result.update(status="error", message=f"internal error: {type(exc).__name__}: {exc}{where}")
    result["seconds"] = round(time.perf_counter() - t0, 3)
    return result


def find_sessions(paths) -> list[Path]:
    """Expand the command's SESSION arguments into sessions.

    A session folder (holding ``session.json``) or an ``.nwb`` file is a session; any other folder is
    searched one level deep for session folders and ``.nwb`` files (sorted by name). A path that does
    not exist is refused.
    """
    found: list[Path] = []
    for p in map(Path, paths):
        if (p / "session.json").is_file() or (p.suffix.lower() == ".nwb" and p.is_file()):
            found.append(p)
        elif p.is_dir():
            inner = sorted(q for q in p.iterdir()
                           if (q / "session.json").is_file() or (q.suffix.lower() == ".nwb" and q.is_file()))
            if not inner:
                raise BadInput(p, None, "is neither a session (no session.json) nor a folder of sessions or "
                                        ".nwb files")
            found.extend(inner)
        else:
            raise BadInput(p, None, "session not found")
    if not found:
        raise BadInput("SESSION", None, "no sessions given")
    return found


def _session_names(sources) -> list[str]:
    names = [s.stem if s.suffix.lower() == ".nwb" else s.resolve().name for s in sources]
    seen: dict = {}
    for name, src in zip(names, sources):
        if name.startswith(".") or name in ("sessions.csv", "population.png", "batch.csv"):
            raise BadInput(src, None, f"cannot be a batch result name: {name!r}")
        if name in seen:
            raise BadInput(src, None, f"has the same name as {seen[name]} ({name!r}): each session's results "
                                      f"go to DIR/<name>/; rename one of them")
        seen[name] = src
    return names


def _prepare_out(out: Path) -> None:
    from .pipeline import RESULTS_MARK
    if out.exists():
        if not out.is_dir():
            raise BadInput(out, "--out", "exists and is not a folder")
        if any(out.iterdir()) and not (out / BATCH_MARK).exists():
            what = ("holds the results of one analysis, not of a batch" if (out / RESULTS_MARK).exists()
                    else "is a non-empty folder not written by map2d batch")
            raise BadInput(out, "--out", f"{what}; choose another")
    out.mkdir(parents=True, exist_ok=True)
    (out / BATCH_MARK).write_text("written by map2d batch\n", encoding="utf-8")


def _write_atomic(path: Path, write) -> None:
    tmp = path.parent / f".{path.name}.partial-{os.getpid()}"
    try:
        write(tmp)
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def combine_tables(out, names) -> tuple[list[str], list[list[str]]]:
    """The rows of ``DIR/<name>/cells.csv`` for ``names`` in order, with a ``session`` column first.

    Values are kept as written (text), so the combined table holds exactly the per-session numbers.
    Columns are in order of first appearance; a column a session lacks is empty in its rows.
    """
    from .contract import read_table
    header = ["session"]
    rows = []
    for name in names:
        h, body = read_table(Path(out) / name / "cells.csv")
        for c in h:
            if c not in header:
                header.append(c)
        rows.extend({"session": name, **dict(zip(h, r))} for r in body)
    return header, [[r.get(c, "") for c in header] for r in rows]


def population_figure(path, header, rows) -> None:
    """``population.png``: agreement histogram, preferred orientations (cells with one), RF centres.

    Values that are empty (not estimated) are left out of each panel; each panel says how many cells
    it shows.
    """
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    import numpy as np

    def value(text):
        if text in ("true", "false"):
            return 1.0 if text == "true" else 0.0
        try:
            return float(text)
        except ValueError:
            return np.nan

    def col(name):
        if name not in header:
            return np.full(len(rows), np.nan)
        k = header.index(name)
        return np.array([value(r[k]) for r in rows], float)

    sessions = [r[0] for r in rows]
    agreement, ori = col("agreement"), col("pref_orientation_deg")
    cx, cy, responsive = col("center_x_deg"), col("center_y_deg"), col("responsive")
    fig, axes = plt.subplots(1, 3, figsize=(13, 4), constrained_layout=True)
    a = agreement[np.isfinite(agreement)]
    axes[0].hist(a, bins=np.linspace(0, 1, 21), color="0.35")
    axes[0].set(xlabel="agreement (map vs gratings)", ylabel="cells", xlim=(0, 1),
                title=f"agreement ({a.size} cells)")
    o = np.mod(ori[np.isfinite(ori)], 180.0)
    axes[1].hist(o, bins=np.arange(0, 181, 15), color="0.35")
    axes[1].set(xlabel="preferred orientation (deg, wave vector)", ylabel="cells", xlim=(0, 180),
                title=f"preferred orientation ({o.size} cells)")
    axes[1].set_xticks(np.arange(0, 181, 45))
    keep = np.isfinite(cx) & np.isfinite(cy) & (responsive == 1)
    names = list(dict.fromkeys(sessions))
    for k, name in enumerate(names):
        m = keep & np.array([s == name for s in sessions])
        axes[2].scatter(cx[m], cy[m], s=14, color=plt.cm.tab10(k % 10), label=name if len(names) <= 10 else None)
    if 1 < len(names) <= 10:
        axes[2].legend(fontsize=7, loc="best")
    axes[2].set(xlabel="azimuth (deg)", ylabel="elevation (deg)", aspect="equal",
                title=f"RF centres, responsive cells ({int(keep.sum())})")
    from matplotlib.ticker import MaxNLocator
    for ax in axes[:2]:
        ax.yaxis.set_major_locator(MaxNLocator(integer=True))
    fig.suptitle(f"{len(rows)} cells from {len(names)} sessions")
    fig.savefig(path, dpi=100, format="png")
    plt.close(fig)


class _Bar:
    """Progress over sessions: silent with ``quiet`` or when stderr is not a terminal."""

    def __init__(self, total, quiet):
        from tqdm import tqdm
        # no monitor thread: a second thread keeps the tuning fits from using worker processes
        tqdm.monitor_interval = 0
        self.quiet = quiet
        self.bar = tqdm(total=total, disable=quiet or not sys.stderr.isatty(), unit="session",
                        desc="map2d batch", leave=False)

    def done(self, name, result):
        if result["status"] != "ok":
            self.write(f"map2d: session {name} failed ({result['status']}): {result['message']}")
        self.bar.update(1)

    def write(self, text):
        if self.bar.disable:
            print(text, file=sys.stderr)
        else:
            self.bar.write(text, file=sys.stderr)

    def close(self):
        self.bar.close()


def _run_distributed(jobs, scheduler, workers, memory_limit, bar) -> dict:
    try:
        import distributed  # noqa: F401  (the optional extra)
    except ImportError:
        raise BadInput("--scheduler", None, DISTRIBUTED_HINT) from None
    import logging
    cluster = None
    results = {}
    # the cluster's own log lines (start-up, heartbeats lost at shutdown) and warnings in its worker
    # processes are chatter (the CLI shows a single run's warnings only with --debug): failures reach
    # batch.csv through the futures. Worker processes read both settings from the environment.
    quiet_env = {"DASK_LOGGING__DISTRIBUTED": "critical", "PYTHONWARNINGS": "ignore"}
    saved_env = {k: os.environ.get(k) for k in quiet_env}
    os.environ.update(quiet_env)
    logging.getLogger("distributed").setLevel(logging.CRITICAL)
    try:
        return _run_on_cluster(jobs, scheduler, workers, memory_limit, bar, cluster, results)
    finally:
        for k, v in saved_env.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v


def _run_on_cluster(jobs, scheduler, workers, memory_limit, bar, cluster, results) -> dict:
    from distributed import Client, LocalCluster, as_completed
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")   # start-up chatter of the cluster (ports, dashboard)
        if scheduler is None:
            cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                                   memory_limit=memory_limit, host="127.0.0.1", dashboard_address=None)
            address = cluster
        else:
            address = scheduler
        try:
            client = Client(address, timeout="20s")
        except (OSError, TimeoutError) as exc:
            if cluster is not None:
                cluster.close()
            raise BadInput("--scheduler", None, f"cannot reach the scheduler at {scheduler} "
                                                f"({type(exc).__name__}: {exc})") from None
    try:
        futures = {}
        for name, args in jobs.items():
            fut = client.submit(analyze_one, *args, key=f"map2d-analyze-{name}-{os.urandom(4).hex()}",
                                pure=False, retries=0)
            futures[fut] = name
        for fut in as_completed(futures):
            name = futures[fut]
            try:
                res = fut.result()
            except Exception as exc:  # the worker died (memory limit, killed) or could not run the task
                res = {"status": "error", "message": f"worker failed: {type(exc).__name__}: {exc}",
                       "cells": None, "responsive": None, "seconds": None, "notes": []}
            results[name] = res
            bar.done(name, res)
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
    return results


def run_batch(sources, out, *, scheduler=None, config=None, max_lag_s: float = 0.2, seed: int = 0,
              workers: int = LOCAL_WORKERS, memory_limit: str = LOCAL_MEMORY_LIMIT, report: bool = True,
              quiet: bool = False, trace_decay="auto", dense_estimate="auto") -> int:
    """``map2d batch``: analyze every session, then write ``sessions.csv``, ``population.png``, ``batch.csv``.

    Parameters
    ----------
    sources : list of str or Path
        Sessions (folders, ``.nwb`` files) or folders of sessions (see :func:`find_sessions`).
    out : str or Path
        Batch folder: ``out/<session name>/`` per session (name = folder name, or ``.nwb`` file name
        without the suffix; two sessions of the same name are refused before anything runs).
    scheduler : None, "sync" or "tcp://HOST:PORT"
        Where to run (module docstring).
    config : str or Path, optional
        NWB mapping used for every ``.nwb`` source.
    max_lag_s, seed :
        As for ``map2d analyze`` (the same seed for every session, so a session gives the same results
        alone or in a batch).
    workers, memory_limit :
        Size of the embedded local cluster (ignored otherwise).
    report : bool
        Write each session's ``report.html`` (default); False saves the time of its figures.
    quiet : bool
        No progress bar and no summary (failures are still reported on stderr).
    trace_decay : "auto", "off" or float
        As ``--trace-decay`` of ``map2d analyze``, for every session (checked before anything runs).
    dense_estimate : "auto", "sta" or "whitened"
        As ``--dense-estimate`` of ``map2d analyze``, for every session; ``batch.csv`` names the
        estimate each session's maps used (``maps_estimate``).

    Returns
    -------
    int
        0 if every session succeeded; 2 if some failed and every failure was bad input; 1 if any failed
        with an internal error (or its worker died).
    """
    from .pipeline import _dense_estimate_option, _trace_decay_option
    trace_decay = _trace_decay_option(trace_decay)
    dense_estimate = _dense_estimate_option(dense_estimate)
    sources = find_sessions(sources)
    names = _session_names(sources)
    if scheduler not in (None, "sync") and not str(scheduler).startswith(("tcp://", "tls://", "inproc://",
                                                                             "ucx://", "ws://", "wss://")):
        raise BadInput("--scheduler", None, f"must be sync or an address such as tcp://127.0.0.1:8786, "
                                            f"got {scheduler!r}")
    if int(workers) < 1:
        raise BadInput("--workers", None, f"must be at least 1, got {workers}")
    nwb = [s for s in sources if s.suffix.lower() == ".nwb"]
    if nwb and config is None:
        raise BadInput(nwb[0], "--config", "an .nwb session needs a mapping: --config mapping.json (or a "
                                           "session folder whose session.json has an nwb key)")
    if config is not None:
        from .nwb import load_mapping
        config = load_mapping(config)    # read once here; workers get the dict
        if not any(s.suffix.lower() == ".nwb" for s in sources):
            raise BadInput("--config", None, "applies to .nwb files, and no SESSION is one")
    out = Path(out).absolute()
    _prepare_out(out)
    jobs = {name: (str(src.absolute()), str(out / name), config if src.suffix.lower() == ".nwb" else None,
                   float(max_lag_s), int(seed), 1, bool(report), trace_decay, dense_estimate)
            for name, src in zip(names, sources)}
    bar = _Bar(len(jobs), quiet)
    t0 = time.perf_counter()
    try:
        if scheduler == "sync":
            results = {}
            for name, args in jobs.items():
                results[name] = analyze_one(*args)
                bar.done(name, results[name])
        else:
            results = _run_distributed(jobs, scheduler, int(workers), memory_limit, bar)
    finally:
        bar.close()
    ok = [n for n in names if results[n]["status"] == "ok"]
    summary = {"session": names, "source": [str(s) for s in sources],
               "status": [results[n]["status"] for n in names],
               "cells": [results[n]["cells"] for n in names],
               "responsive": [results[n]["responsive"] for n in names],
               "maps_estimate": [results[n].get("maps_estimate", "") for n in names],
               "seconds": [results[n]["seconds"] for n in names],
               "message": [results[n]["message"] for n in names]}
    from .contract import write_table
    _write_atomic(out / "batch.csv", lambda p: write_table(p, summary))
    if ok:
        header, rows = combine_tables(out, ok)
        _write_atomic(out / "sessions.csv", lambda p: write_table(p, {c: [r[k] for r in rows]
                                                                      for k, c in enumerate(header)}))
        _write_atomic(out / "population.png", lambda p: population_figure(p, header, rows))
    else:   # nothing analyzed this time: combined files of an earlier run would be misleading
        for stale in ("sessions.csv", "population.png"):
            (out / stale).unlink(missing_ok=True)
    failed = [n for n in names if results[n]["status"] != "ok"]
    if not quiet:
        n_cells = sum(results[n]["cells"] or 0 for n in ok)
        print(f"map2d batch: {len(ok)} of {len(names)} sessions analyzed ({n_cells} cells) in "
              f"{time.perf_counter() - t0:.1f} s; results in {out}")
        if ok:
            print(f"map2d batch: combined table {out / 'sessions.csv'}, figure {out / 'population.png'}")
    if failed:
        print(f"map2d batch: {len(failed)} failed: {', '.join(failed)} (details in {out / 'batch.csv'})",
              file=sys.stderr)
        return 2 if all(results[n]["status"] == "bad input" for n in failed) else 1
    return 0

