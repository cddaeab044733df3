"""Errors that reach the user as one short line."""

from __future__ import annotations

import errno
import os

#: ``errno`` values that mean the machine refused (storage, permissions), not a bug of map2d.
ENVIRONMENT_ERRNOS = frozenset(getattr(errno, n) for n in
                               ("ENOSPC", "EDQUOT", "EACCES", "EPERM", "EROFS", "EFBIG", "ENAMETOOLONG",
                                "EIO", "EMFILE", "ENFILE", "EILSEQ") if hasattr(errno, n))


class BadInput(Exception):
    """A user's input is wrong. The CLI prints the message (no traceback) and exits with code 2.

    Parameters
    ----------
    file : str
        The file (or argument) at fault, as the user named it.
    field : str, optional
        The field, column, key or array inside it.
    detail : str
        What is wrong, in plain words.
    row : int, optional
        Row or index where the defect was found (0-based for arrays, 1-based data rows for CSV,
        as the message says).

    Examples
    --------
    >>> str(BadInput("gratings.csv", "sf_cpd", "is not a number", row=3))
    'gratings.csv: field sf_cpd, row 3: is not a number'
    """

    def __init__(self, file, field=None, detail="is invalid", row=None):
        self.file = str(file)
        self.field = field
        self.row = row
        self.detail = detail
        parts = [self.file]
        if field is not None:
            parts.append(f"field {field}")
        if row is not None:
            parts.append(f"row {row}")
        super().__init__(_one_line(": ".join([parts[0], ", ".join(parts[1:])]) + f": {detail}"
                                   if len(parts) > 1 else f"{parts[0]}: {detail}"))


def _one_line(text: str) -> str:
    """``text`` with line breaks and other control characters shown as escapes (a file name read from
    a manifest may hold them), so that the message stays one line."""
    if text.isprintable():
        return text
    return "".join(c if c.isprintable() else repr(c)[1:-1] for c in text)


class BadEnvironment(BadInput):
    """The machine refused: a full disk, a missing permission, a read-only or vanished folder. Not a
    bug of map2d: the CLI prints the path and the reason and exits with code 2, like bad input.

    Examples
    --------
    >>> str(BadEnvironment("/data/out", None, "cannot write (No space left on device)"))
    '/data/out: cannot write (No space left on device)'
    """


class Terminated(KeyboardInterrupt):
    """Raised in the main thread by the CLI's SIGTERM handler, so that a stopped run cleans up
    (temporary folders removed, worker processes ended) like an interrupted one."""


#: Set by the CLI's SIGTERM handler. An exception raised from a signal handler can be swallowed
#: by library code that catches everything (seen once inside logging's lock release), so the
#: results folder also checks this flag before it moves anything into place.
STOP_REQUESTED = False


def request_stop():
    """Record a stop request (SIGTERM) and raise :class:`Terminated`."""
    global STOP_REQUESTED
    STOP_REQUESTED = True
    raise Terminated()


def raise_if_stopped():
    """Raise :class:`Terminated` if a stop was requested earlier, even if its first exception was lost."""
    if STOP_REQUESTED:
        raise Terminated()


def environment_error(exc, path=None, doing="write"):
    """A :class:`BadEnvironment` for the OSError ``exc`` if its errno is one of
    :data:`ENVIRONMENT_ERRNOS` (naming ``exc.filename``, else ``path``), else None.

    Examples
    --------
    >>> str(environment_error(OSError(28, "No space left on device"), "/data/out"))
    '/data/out: cannot write (No space left on device)'
    >>> environment_error(OSError(2, "No such file or directory")) is None
    True
    """
    if not isinstance(exc, OSError) or exc.errno not in ENVIRONMENT_ERRNOS:
        return None
    where = exc.filename if exc.filename is not None else path
    if where is None:
        where = "map2d"
    reason = exc.strerror or os.strerror(exc.errno)
    return BadEnvironment(os.fsdecode(where) if isinstance(where, bytes) else where, None,
                          f"cannot {doing} ({reason})")
