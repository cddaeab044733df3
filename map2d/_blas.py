"""One BLAS thread while a stage runs: for stages made of many small matrix operations.

numpy's OpenBLAS starts one thread per core for a matrix operation above a small size. For the small
matrices of the fit stage (a 13 x 1024 singular value decomposition per cell, stacked 8 x 8 solves and
8 x P products) the threads cost more than they compute, and on a machine whose cores are busy they spin
while waiting for each other: measured on a loaded 2-core machine, one such decomposition took 21 ms of
CPU with the default threads and 0.5 ms with one (``benchmarks/README.md``). The stages that want both
cores use processes instead (:mod:`map2d._forked`).

The thread count is set through OpenBLAS's own function (``openblas_set_num_threads``, under the prefixed
names of the builds numpy and scipy ship) in every OpenBLAS library loaded in this process, and put back
afterwards. Where no such library or function is found (another BLAS), nothing is changed.
"""

from __future__ import annotations

import contextlib
import ctypes
import functools
import os

__all__ = ["one_blas_thread", "with_one_blas_thread"]

#: (set, get) function names of the OpenBLAS builds: numpy's 64-bit-integer build, scipy's, plain OpenBLAS.
_FUNCTIONS = (("scipy_openblas_set_num_threads64_", "scipy_openblas_get_num_threads64_"),
              ("scipy_openblas_set_num_threads", "scipy_openblas_get_num_threads"),
              ("openblas_set_num_threads", "openblas_get_num_threads"))


def _openblas_libraries():
    """Paths of the OpenBLAS libraries mapped into this process (Linux ``/proc/self/maps``)."""
    paths = []
    with contextlib.suppress(OSError):
        with open("/proc/self/maps") as fh:
            for line in fh:
                path = line.rstrip("\n").split(maxsplit=5)[-1] if "/" in line else ""
                if "openblas" in os.path.basename(path).lower() and path not in paths:
                    paths.append(path)
    return paths


def _controls():
    """(set, current count) of every loaded OpenBLAS whose thread functions are found."""
    out = []
    for path in _openblas_libraries():
        try:
            lib = ctypes.CDLL(path)
        except OSError:
            continue
        for set_name, get_name in _FUNCTIONS:
            if hasattr(lib, set_name) and hasattr(lib, get_name):
                get = getattr(lib, get_name)
                get.restype = ctypes.c_int
                setter = getattr(lib, set_name)
                setter.argtypes = [ctypes.c_int]
                out.append((setter, int(get())))
                break
    return out


@contextlib.contextmanager
def one_blas_thread():
    """Within the block, OpenBLAS computes on one thread; the former counts are restored after."""
    controls = _controls()
    for setter, _ in controls:
        setter(1)
    try:
        yield
    finally:
        for setter, n in controls:
            setter(max(int(n), 1))


def with_one_blas_thread(fn):
    """Decorator: ``fn`` runs within :func:`one_blas_thread`."""
    @functools.wraps(fn)
    def run(*args, **kwargs):
        with one_blas_thread():
            return fn(*args, **kwargs)
    return run
