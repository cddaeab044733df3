"""Run one function on the second core: a forked child process, with a safe serial fallback."""

from __future__ import annotations

import os
import pickle
import threading

__all__ = ["ForkedCall"]


class ForkedCall:
    """Run ``fn()`` in a forked child process while the caller keeps working.

    The child inherits every array (copy-on-write, nothing is pickled on the way in) and sends its
    result back through a pipe. The fork is made only from a single-threaded process (a forked copy of
    a threaded one, e.g. a Dask worker, can hang on a lock another thread held) on a machine with at
    least two cores. Where fork is unavailable or anything fails, :meth:`result` runs ``fn()`` here
    instead, so the answer never depends on it.
    """

    def __init__(self, fn, enabled=True):
        self.fn, self.pid, self.fd = fn, None, None
        if (not enabled or not hasattr(os, "fork") or (os.cpu_count() or 1) < 2
                or threading.active_count() > 1):
            return
        try:
            r, w = os.pipe()
            pid = os.fork()
        except OSError:
            return
        if pid == 0:                                                   # child
            code = 0
            try:
                os.close(r)
                with os.fdopen(w, "wb") as fh:
                    pickle.dump(fn(), fh, protocol=pickle.HIGHEST_PROTOCOL)
            except BaseException:
                code = 1
            finally:
                os._exit(code)
        os.close(w)
        self.pid, self.fd = pid, r

    def result(self):
        """``fn()``'s value: from the child when it succeeded, else computed here."""
        if self.pid is None:
            return self.fn()
        try:
            with os.fdopen(self.fd, "rb") as fh:
                out = pickle.load(fh)
        except Exception:
            out = None
        _, status = os.waitpid(self.pid, 0)
        if out is None or status != 0:
            return self.fn()
        return out
