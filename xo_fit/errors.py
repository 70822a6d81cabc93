"""The one exception family for user errors.

Anything a user can get wrong (a job file, a measurement file, a command-line
value) raises :class:`XoFitError` or a subclass. The command line catches this
base class only, prints ``str(error)`` as one line on stderr and exits 2; any
other exception is a bug and keeps its traceback.

``str(error)`` reads ``path:line: [key] message`` with whichever parts are known.
"""

from __future__ import annotations

from contextlib import contextmanager
import re
from pathlib import Path
from collections.abc import Iterator, Mapping


class XoFitError(Exception):
    """A user error: bad input, bad data, an impossible request.

    Parameters
    ----------
    message : str
        What is wrong and what was expected, in one sentence.
    path : str or Path, optional
        The file the error is in, if any.
    line : int, optional
        1-based line number in ``path`` (dimensionless), if known.
    key : str, optional
        The key, table or part the error is about (``"[grid] points"``,
        ``"part L1"``), if any.
    """

    #: The command line's exit status for this error (2: bad input).
    exit_code = 2

    def __init__(
        self,
        message: str,
        *,
        path: str | Path | None = None,
        line: int | None = None,
        key: str | None = None,
    ) -> None:
        super().__init__(message)
        self.message = message
        self.path = None if path is None else str(path)
        self.line = line
        self.key = key

    def __str__(self) -> str:
        where = ""
        if self.path is not None:
            where = self.path
            if self.line is not None:
                where += f":{self.line}"
            where += ": "
        key = f"{self.key}: " if self.key else ""
        # one line, always, and no control character (an escape sequence in a name) reaches the terminal
        return printable((where + key + self.message).replace("\n", " "))


_CONTROL = re.compile(r"[\x00-\x08\x0b-\x1f\x7f-\x9f\u2028\u2029]")


def printable(text: str) -> str:
    """``text`` for a terminal: control characters other than line breaks and tabs (an ESC sequence, a carriage
    return, a NUL) written as escapes such as ``\\x1b``, so that user text cannot move the cursor or recolour it."""
    return _CONTROL.sub(lambda m: repr(m[0])[1:-1], str(text))


class JobError(XoFitError):
    """The job file is malformed: TOML syntax, an unknown key, a bad value."""


class DataError(XoFitError):
    """A measurement, curve, inventory or result file is malformed."""


class WriteError(XoFitError):
    """An output could not be written (a full disk, no permission, a folder where a file should go): exit 1."""

    exit_code = 1


class NetworkError(XoFitError):
    """The netlist cannot be built: duplicate names, islands, shorted parts."""


#: The largest file read for the user (a job, a measurement, a drawer, a result), bytes.
MAX_USER_FILE = 64 * 1024 * 1024


#: Files given by their bytes instead of read from disk (:func:`supplied_files`): path -> bytes.
_SUPPLIED: dict[str, bytes] = {}


@contextmanager
def supplied_files(files: Mapping[str, bytes] | None) -> Iterator[None]:
    """Within the block, :func:`read_user_bytes` of a path in ``files`` (keyed by ``str(path)``) returns the given
    bytes instead of reading the disk: a batch's cluster worker gets its job's files this way, with no shared
    disk. ``None`` or an empty mapping supplies nothing."""
    _SUPPLIED.update(files or {})
    try:
        yield
    finally:
        for key in files or {}:
            _SUPPLIED.pop(key, None)


def shown_path(path: str | Path) -> str:
    """A path as a message shows it: control characters (a line break, an escape sequence) as escapes."""
    text = str(path)
    return text if text.isprintable() else repr(text)[1:-1]


def read_user_bytes(path: str | Path, what: str, error: type = DataError) -> bytes:
    """The bytes of a regular file the user named, at most MAX_USER_FILE of them.

    A missing, unreadable or oversized file, a device or pipe (``/dev/zero`` would never end), or a path with
    a NUL raises ``error`` naming it and ``what`` it is.
    """
    import os
    import stat

    path = Path(path)
    if _SUPPLIED and str(path) in _SUPPLIED:
        return _SUPPLIED[str(path)]
    try:
        # the kind of file is checked before it is opened: opening a FIFO blocks until a writer comes
        mode = os.stat(path).st_mode
        if stat.S_ISDIR(mode):
            raise IsADirectoryError
        if not stat.S_ISREG(mode):
            raise error(f"the {what} is not a regular file (a pipe, device or socket)", path=shown_path(path))
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_NOCTTY", 0))
        with open(fd, "rb") as fh:
            if not stat.S_ISREG(os.fstat(fh.fileno()).st_mode):  # swapped between the two looks
                raise error(f"the {what} is not a regular file (a pipe, device or socket)", path=shown_path(path))
            raw = fh.read(MAX_USER_FILE + 1)
    except FileNotFoundError:
        raise error(f"{what} not found", path=shown_path(path)) from None
    except IsADirectoryError:
        raise error(f"the {what} is a folder, not a file", path=shown_path(path)) from None
    except (OSError, ValueError) as e:  # ValueError: a NUL in the path
        raise error(f"cannot read the {what}: {getattr(e, 'strerror', None) or e}", path=shown_path(path)) from None
    if len(raw) > MAX_USER_FILE:
        raise error(f"the {what} is larger than {MAX_USER_FILE // 2**20} MiB", path=shown_path(path))
    return raw


def read_user_text(path: str | Path, what: str, error: type = DataError, encoding: str = "utf-8-sig") -> str:
    """The text of a file the user named; a missing, unreadable or undecodable one raises ``error``."""
    raw = read_user_bytes(path, what, error)
    try:
        return raw.decode(encoding)
    except UnicodeDecodeError as e:
        raise error(f"cannot read the {what}: not {encoding.split('-sig')[0].upper()} text ({e.reason} at byte "
                    f"{e.start})", path=shown_path(path)) from None
