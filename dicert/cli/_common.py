"""Shared pieces of the CLI: error handling, JSON output, consoles, progress bars.

Every command is wrapped with :func:`handle_errors`, which turns a :class:`DicertError`
into ONE line on stderr and the error's exit code (2 for bad input), never a traceback.
"""

from __future__ import annotations

import functools
import json
import sys
from collections.abc import Callable
from typing import Annotated, Any, TypeVar

import typer

from dicert.errors import DicertError

F = TypeVar("F", bound=Callable[..., Any])

CAUTION = (
    "Certificates hold only under the stated assumptions: no communication between the "
    "stations during a trial, settings independent of the devices and of any adversary, "
    "trusted classical post-processing, and the side-information model of the method. "
    "For production use, defer to applicable standards and accredited review."
)

JsonFlag = Annotated[bool, typer.Option("--json", help="Print machine-readable JSON on stdout.")]


def handle_errors(func: F) -> F:
    """Map dicert errors to a one-line message and an exit code."""

    @functools.wraps(func)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        try:
            return func(*args, **kwargs)
        except DicertError as exc:
            msg = " ".join(str(exc).split())
            typer.echo(f"dicert: error: {msg}", err=True)
            raise typer.Exit(code=exc.exit_code) from None
        except FileNotFoundError as exc:
            typer.echo(f"dicert: error: {exc.filename}: no such file", err=True)
            raise typer.Exit(code=2) from None
        except OSError as exc:
            # Disk full, permission denied, read-only file system, a path under a regular
            # file...: one line naming the path and the cause (outputs are written to a
            # temporary file and renamed, so nothing is half-written).
            typer.echo(f"dicert: error: {os_error_line(exc)}", err=True)
            raise typer.Exit(code=2) from None
        except ModuleNotFoundError as exc:
            typer.echo(
                f"dicert: error: the library {exc.name!r} is not installed; reinstall dicert "
                "with its dependencies (pip install dicert)",
                err=True,
            )
            raise typer.Exit(code=2) from None

    return wrapper  # type: ignore[return-value]


def os_error_line(exc: OSError) -> str:
    """"PATH: cause (ENAME)" for an OSError, on one line."""
    import errno

    cause = " ".join(str(exc.strerror or exc).split())
    name = errno.errorcode.get(exc.errno or 0)
    if name:
        cause += f" ({name})"
    path = exc.filename if exc.filename is not None else "(unnamed file)"
    if exc.filename2 is not None:
        path = f"{path} -> {exc.filename2}"
    return f"{path}: {cause}"


def to_jsonable(obj: Any) -> Any:
    """Convert dataclasses, numpy values and paths into plain JSON values."""
    from dicert._plain import plain

    return plain(obj)


def emit_json(obj: Any) -> None:
    """Write ``obj`` as JSON on stdout (one document, sorted keys)."""
    sys.stdout.write(json.dumps(to_jsonable(obj), indent=2, sort_keys=True) + "\n")
    sys.stdout.flush()


def stdout_console():
    from rich.console import Console

    return Console()


def stderr_console():
    from rich.console import Console

    return Console(stderr=True)


class _NoProgress:
    """Stand-in for a rich Progress when stderr is not a terminal (and rich need not load)."""

    def __enter__(self) -> _NoProgress:
        return self

    def __exit__(self, *exc: object) -> None:
        return None

    def add_task(self, *args: Any, **kwargs: Any) -> int:
        return 0

    def update(self, *args: Any, **kwargs: Any) -> None:
        return None

    def advance(self, *args: Any, **kwargs: Any) -> None:
        return None


def progress_bar(transient: bool = True):
    """A rich progress bar on stderr; a silent stand-in when stderr is not a terminal."""
    if not sys.stderr.isatty():
        return _NoProgress()
    from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn

    return Progress(
        TextColumn("[progress.description]{task.description}"),
        BarColumn(),
        TextColumn("{task.percentage:>3.0f}%"),
        TimeRemainingColumn(),
        console=stderr_console(),
        transient=transient,
    )


def kv_table(title: str, rows: list[tuple[str, Any]]):
    """A two-column rich table of labelled values; both columns fold (wrap inside a word)
    instead of cutting, so a digest or key fingerprint is always shown whole."""
    from rich.table import Table

    table = Table(title=title, show_header=False, title_justify="left")
    table.add_column("quantity", style="bold", overflow="fold", ratio=2)
    table.add_column("value", overflow="fold", ratio=3)
    for key, value in rows:
        table.add_row(key, value if isinstance(value, str) else _fmt(value))
    return table


def _fmt(value: Any) -> str:
    if isinstance(value, float):
        if value == 0 or 1e-4 <= abs(value) < 1e7:
            return f"{value:.6g}"
        return f"{value:.4e}"
    return str(value)
