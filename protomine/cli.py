"""The ``protomine`` command: composes the stage commands; each lives beside its library code."""
from __future__ import annotations

import functools
import importlib
import sys

import typer

from .errors import InputError

app = typer.Typer(add_completion=False, no_args_is_help=True, pretty_exceptions_enable=False,
                  help="Mine pose-aware object prototypes from unlabelled RGB-D captures.")

COMMANDS: list[tuple[str, str]] = [
    # (module under protomine, function name); each stage adds its own line
    ("demo", "demo"),
    ("provenance", "provenance_cmd"),
    ("bench", "bench"),
    ("ingest.command", "ingest"),
    ("mine.command", "mine"),
    ("scenes.command", "scenes"),
    ("audit.command", "audit"),
    ("label.command", "label"),
    ("curate.command", "tag"),
    ("curate.command", "find"),
    ("curate.command", "export"),
]


def _print_version(value: bool) -> None:
    if value:
        from . import __version__
        from .version import code_commit
        print(f"protomine {__version__} (commit {code_commit()})")
        raise typer.Exit()


@app.callback()
def _root(version: bool = typer.Option(False, "--version", callback=_print_version, is_eager=True,
                                       help="Print the version and the commit, then exit.")) -> None:
    """Find objects in RGB-D captures, lift them to 3D volumes, mine pose-aware prototypes, label, audit."""


def guarded(fn):
    """Bad input becomes one line on stderr and exit code 2, never a traceback."""
    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        try:
            return fn(*args, **kwargs)
        except InputError as e:
            print(f"error: {e}", file=sys.stderr)
            raise typer.Exit(2) from None
    return wrapper


def _register() -> None:
    for mod, name in COMMANDS:
        module = importlib.import_module(f"protomine.{mod}")
        app.command(name=name.removesuffix("_cmd"))(guarded(getattr(module, name)))


_register()


def main() -> None:
    app()
