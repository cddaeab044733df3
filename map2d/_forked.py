"""Work on the second core: a forked child (:class:`ForkedCall`) or a pool of worker processes
(:func:`worker_pool`), both bound to the life of the process that started them.

A worker that outlives its parent holds its memory (hundreds of MB for a big session) forever: it
never learns that nobody waits for its answer. Every child made here therefore asks the kernel for
a signal when its parent ends (Linux ``prctl(PR_SET_PDEATHSIG)``; elsewhere a thread that polls the
parent id), ignores the terminal's Ctrl-C and the default SIGTERM handling of its parent (the parent
decides and ends them), and a pool whose caller fails or is interrupted kills its workers at once
instead of finishing the queued work.
"""

from __future__ import annotations

import contextlib
import os
import pickle
import signal
import sys
import threading

__all__ = ["ForkedCall", "worker_pool", "bind_to_parent"]

_PR_SET_PDEATHSIG = 1   # <linux/prctl.h>


def _parent_death_signal(sig) -> bool:
    """Ask Linux to send ``sig`` to this process when the thread that created it ends."""
    if not sys.platform.startswith("linux"):
        return False
    try:
        import ctypes
        libc = ctypes.CDLL(None, use_errno=True)
        return libc.prctl(_PR_SET_PDEATHSIG, int(sig), 0, 0, 0) == 0
    except Exception:
        return False


def _watch_parent(parent_pid, period_s=0.5):
    """Fallback without prctl: a daemon thread that ends this process once its parent is gone."""
    import time

    def watch():
        while os.getppid() == parent_pid:
            time.sleep(period_s)
        os._exit(1)

    threading.Thread(target=watch, name="map2d-parent-watch", daemon=True).start()


def bind_to_parent(parent_pid) -> None:
    """In a child process: die with the parent ``parent_pid`` (SIGKILL on its death, or a watcher
    thread), leave SIGINT to the parent and restore default SIGTERM handling.

    If the parent already died before this ran (it is no longer our parent), exit at once.
    """
    with contextlib.suppress(ValueError, OSError):    # only possible in a main thread
        signal.signal(signal.SIGINT, signal.SIG_IGN)
        signal.signal(signal.SIGTERM, signal.SIG_DFL)
    if not _parent_death_signal(signal.SIGKILL):
        _watch_parent(parent_pid)
    if os.getppid() != parent_pid:                   # the parent died before the request
        os._exit(1)


def _fork_context():
    """The multiprocessing context for pools: fork where available (workers are then children of
    this process, which :func:`bind_to_parent` relies on), else the default."""
    import multiprocessing
    if "fork" in multiprocessing.get_all_start_methods():
        return multiprocessing.get_context("fork")
    return None


def _stop_workers(ex, before=frozenset()) -> None:
    """Kill the workers of ``ex`` now and drop its queued work (the caller failed or was stopped).

    A worker forked but not yet registered (an interruption in the middle of the pool's start) is
    found among this process's children not in ``before`` (their ids before the pool existed): left
    alive, the exit handler of :mod:`multiprocessing` would wait for it forever."""
    import multiprocessing
    procs = list((getattr(ex, "_processes", None) or {}).values())
    with contextlib.suppress(Exception):
        procs += [p for p in multiprocessing.active_children() if p.pid not in before and p not in procs]
    manager = getattr(ex, "_executor_manager_thread", None)
    for p in procs:
        with contextlib.suppress(Exception):
            p.kill()
    with contextlib.suppress(Exception):
        ex.shutdown(wait=False, cancel_futures=True)
    if manager is not None:      # let the pool's thread finish before the interpreter's exit handler
        with contextlib.suppress(Exception):     # wakes it (a closing pipe there prints a traceback)
            manager.join(timeout=10)
    for p in procs:
        with contextlib.suppress(Exception):
            p.join(timeout=5)


@contextlib.contextmanager
def worker_pool(n_jobs):
    """A :class:`concurrent.futures.ProcessPoolExecutor` of ``n_jobs`` workers bound to this process.

    Workers die with this process (SIGKILL, SIGTERM, a crash), and leaving the ``with`` block by an
    exception (including KeyboardInterrupt or the CLI's SIGTERM handler) kills them and drops the
    queued work instead of waiting for it. A normal exit waits for the workers as usual.
    """
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor
    before = frozenset(p.pid for p in multiprocessing.active_children())
    ex = ProcessPoolExecutor(max_workers=n_jobs, mp_context=_fork_context(), initializer=bind_to_parent,
                             initargs=(os.getpid(),))
    try:
        yield ex
        ex.shutdown(wait=True)              # interrupted while waiting: the workers are killed too
    except BaseException:
        _stop_workers(ex, before)
        raise


class ForkedCall:
    """Run ``fn()`` in a forked child process while the caller keeps working.

    The child inherits every array (copy-on-write, nothing is pickled on the way in) and sends its
    result back through a pipe. The fork is made only from a single-threaded process (a forked copy of
    a threaded one, e.g. a Dask worker, can hang on a lock another thread held) on a machine with at
    least two cores. Where fork is unavailable or anything fails, :meth:`result` runs ``fn()`` here
    instead, so the answer never depends on it. The child dies with this process
    (:func:`bind_to_parent`), and :meth:`cancel` (also run when the object is collected before
    :meth:`result`) ends it early.
    """

    def __init__(self, fn, enabled=True):
        self.fn, self.pid, self.fd = fn, None, None
        if (not enabled or not hasattr(os, "fork") or (os.cpu_count() or 1) < 2
                or threading.active_count() > 1):
            return
        parent = os.getpid()
        try:
            r, w = os.pipe()
            pid = os.fork()
        except OSError:
            return
        if pid == 0:                                                   # child
            code = 0
            try:
                bind_to_parent(parent)
                os.close(r)
                with os.fdopen(w, "wb") as fh:
                    pickle.dump(fn(), fh, protocol=pickle.HIGHEST_PROTOCOL)
            except BaseException:
                code = 1
            finally:
                os._exit(code)
        os.close(w)
        self.pid, self.fd = pid, r

    def cancel(self) -> None:
        """End the child (if still running) and reap it; :meth:`result` then computes here."""
        if self.pid is None:
            return
        pid, self.pid = self.pid, None
        with contextlib.suppress(OSError):
            os.kill(pid, signal.SIGKILL)
        with contextlib.suppress(OSError):
            os.waitpid(pid, 0)
        with contextlib.suppress(OSError):
            os.close(self.fd)

    def __del__(self):
        with contextlib.suppress(Exception):
            self.cancel()

    def result(self):
        """``fn()``'s value: from the child when it succeeded, else computed here."""
        if self.pid is None:
            return self.fn()
        pid, self.pid = self.pid, None
        try:
            with os.fdopen(self.fd, "rb") as fh:
                out = pickle.load(fh)
        except Exception:
            out = None
        except BaseException:                   # interrupted while waiting: do not leave the child
            with contextlib.suppress(OSError):
                os.kill(pid, signal.SIGKILL)
            with contextlib.suppress(OSError):
                os.waitpid(pid, 0)
            raise
        _, status = os.waitpid(pid, 0)
        if out is None or status != 0:
            return self.fn()
        return out
