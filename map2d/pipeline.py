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
    """``map2d stimulus ...``."""
    raise NotImplementedError("stimulus command not built yet")


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
