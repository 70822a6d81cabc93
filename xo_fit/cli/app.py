"""The ``xo-fit`` command line (README.md describes every command).

Commands parse their arguments, call the library and render the outcome. A
user error (:class:`~xo_fit.errors.XoFitError`) becomes one line on stderr and
exit code 2; anything else is a bug and keeps its traceback (exit 1).
"""

from __future__ import annotations

import sys

import typer

from xo_fit.cli import designs, files, prepare, showcase  # noqa: F401  (they register their commands on the app)
from xo_fit.cli.base import app
from xo_fit.cli.console import OUT
from xo_fit.errors import XoFitError


def run() -> None:
    """Console entry point: run, then exit even if a library left a non-daemon thread behind.

    (nevergrad's NGOpt, failing under numpy >= 2.4, leaves such a thread, which would keep the
    process alive after the command has finished.)
    """
    import os
    import threading

    code = main()
    stray = [t for t in threading.enumerate() if t is not threading.main_thread() and t.is_alive() and not t.daemon]
    sys.stdout.flush()
    sys.stderr.flush()
    if stray or code == 130:
        # 130: an interrupt that met a library's C code can leave Python's "unhandled Ctrl-C" mark set, and the
        # interpreter would then end by killing itself with SIGINT (-2) instead of the exit code said
        os._exit(code)
    sys.exit(code)


#: The options every command takes, accepted before the command or after it (`xo-fit fit JOB --quiet`).
COMMON_OPTIONS = ("-q", "--quiet", "-v", "--verbose")


def common_first(argv: list[str]) -> list[str]:
    """``argv`` with the common options moved before the command, wherever the user put them (up to a ``--``)."""
    cut = argv.index("--") if "--" in argv else len(argv)
    common = [a for a in argv[:cut] if a in COMMON_OPTIONS]
    return common + [a for a in argv[:cut] if a not in COMMON_OPTIONS] + argv[cut:]


def _from_interrupt(e: BaseException) -> bool:
    """Whether a KeyboardInterrupt is among the causes of ``e``."""
    seen = set()
    cause: BaseException | None = e
    while cause is not None and id(cause) not in seen:
        if isinstance(cause, KeyboardInterrupt):
            return True
        seen.add(id(cause))
        cause = cause.__cause__ or cause.__context__
    return False


def main(argv: list[str] | None = None) -> int:
    """Run the command line; return the exit code (0 done, 1 failure, 2 bad input, 130 interrupted)."""
    from xo_fit.search.interrupt import sigterm_interrupts

    OUT.noted = False
    args = common_first(list(sys.argv[1:] if argv is None else argv))
    try:
        with sigterm_interrupts():  # SIGTERM as Ctrl-C: searches keep their best, temporary files are removed
            app(args=args, prog_name="xo-fit")
        return 0
    except XoFitError as e:
        typer.echo(f"xo-fit: error: {e}", err=True)
        return e.exit_code
    except KeyboardInterrupt:  # Ctrl-C or SIGTERM outside a search (which keeps its best design itself)
        pass
    except Exception as e:  # an interrupt inside an import or a class body comes wrapped (a RuntimeError)
        if not _from_interrupt(e):
            raise
    except SystemExit as e:  # typer's own exits: --help (0), usage errors (2); 130: it caught a KeyboardInterrupt
        if e.code is None:
            return 0
        if e.code != 130:
            return e.code if isinstance(e.code, int) else 1
    if not OUT.noted:  # fit and prune have said where the best design so far is; otherwise say this much
        typer.echo("xo-fit: interrupted", err=True)
    return 130
