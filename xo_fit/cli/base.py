"""The typer application and its common options (--quiet, --verbose, --version)."""

from __future__ import annotations

import typer

from xo_fit.cli.console import OUT

app = typer.Typer(add_completion=False, pretty_exceptions_enable=False, no_args_is_help=True,
                  help="Fit passive loudspeaker crossover part values to measured drivers and an acoustic target.")


def _version(value: bool) -> None:
    if value:
        from xo_fit import __version__

        typer.echo(f"xo-fit {__version__}")
        raise typer.Exit(0)


@app.callback()
def _common(quiet: bool = typer.Option(False, "--quiet", "-q", help="Print only errors and warnings."),
            verbose: bool = typer.Option(False, "--verbose", "-v", help="Print more detail."),
            version: bool = typer.Option(False, "--version", callback=_version, is_eager=True,
                                         help="Print the version and exit.")) -> None:
    OUT.quiet = quiet
    OUT.verbose = verbose
