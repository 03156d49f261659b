"""The ``dicert`` command: combines one small typer module per command group.

Each module ``dicert.cli.<name>`` exposes ``register(app)``. Modules import only typer and
the standard library at top level, so ``dicert --help`` answers fast.
"""

from __future__ import annotations

import importlib
import importlib.util

import typer

from dicert import __version__
from dicert.cli._common import CAUTION

HELP = (
    "Turn the trial logs of a Bell experiment into random bits whose unpredictability is "
    "certified device-independently, with a signed audit record anyone can re-check.\n\n"
    f"CAUTION: {CAUTION}"
)

# Order of commands in --help; a module that is not present is skipped.
COMMAND_MODULES = (
    "demo",
    "certify",
    "verify",
    "publish",
    "report",
    "inspect",
    "plan",
    "protocols",
    "entropy",
    "extract",
    "health",
    "simulate",
    "convert",
    "keygen",
    "bench",
)

app = typer.Typer(
    name="dicert",
    help=HELP,
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_show_locals=False,
    rich_markup_mode=None,
)


def _version(value: bool) -> None:
    if value:
        typer.echo(f"dicert {__version__}")
        raise typer.Exit()


@app.callback()
def _root(
    version: bool = typer.Option(
        False, "--version", callback=_version, is_eager=True, help="Print the version and exit."
    ),
) -> None:
    """Device-independent randomness certification."""


for _name in COMMAND_MODULES:
    _mod = f"dicert.cli.{_name}"
    if importlib.util.find_spec(_mod) is not None:
        importlib.import_module(_mod).register(app)


def main() -> None:
    """Console-script entry point."""
    app()


if __name__ == "__main__":  # pragma: no cover
    main()
