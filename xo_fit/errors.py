"""The one exception family for user errors.

Anything a user can get wrong (a job file, a measurement file, a command-line
value) raises :class:`XoFitError` or a subclass. The command line catches this
base class only, prints ``str(error)`` as one line on stderr and exits 2; any
other exception is a bug and keeps its traceback.

``str(error)`` reads ``path:line: [key] message`` with whichever parts are known.
"""

from __future__ import annotations

from pathlib import Path


class XoFitError(Exception):
    """A user error: bad input, bad data, an impossible request.

    Parameters
    ----------
    message:
        What is wrong and what was expected, in one sentence.
    path:
        The file the error is in, if any.
    line:
        1-based line number in ``path``, if known.
    key:
        The key, table or part the error is about (``"[grid] points"``,
        ``"part L1"``), if any.
    """

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
        # one line, always
        return (where + key + self.message).replace("\n", " ")


class JobError(XoFitError):
    """The job file is malformed: TOML syntax, an unknown key, a bad value."""


class DataError(XoFitError):
    """A measurement, curve, inventory or result file is malformed."""


class NetworkError(XoFitError):
    """The netlist cannot be built: duplicate names, islands, shorted parts."""


def read_user_text(path: str | Path, what: str, error: type = DataError, encoding: str = "utf-8-sig") -> str:
    """The text of a file the user named; a missing or unreadable one raises ``error`` naming it and ``what`` it is."""
    path = Path(path)
    try:
        return path.read_text(encoding=encoding)
    except FileNotFoundError:
        raise error(f"{what} not found", path=path) from None
    except (OSError, UnicodeDecodeError) as e:
        raise error(f"cannot read the {what}: {e}", path=path) from None
