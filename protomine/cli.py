"""The ``protomine`` command: composes the stage commands; each lives beside its library code."""
from __future__ import annotations

import functools
import importlib
import sys

import typer

from .errors import InputError

# plain click help (rich_markup_mode=None): flags read as flags (no "<bool>" column) and "[scale]" in a
# help text stays text; commands are listed in COMMANDS order, which is the pipeline's order
app = typer.Typer(add_completion=False, no_args_is_help=True, pretty_exceptions_enable=False, rich_markup_mode=None,
                  context_settings={"max_content_width": 110},
                  help="Mine pose-aware object prototypes from unlabelled RGB-D captures.")

COMMANDS: list[tuple[str, str]] = [
    # (module under protomine, function name), in pipeline order: the order `protomine --help` lists them
    ("scenes.command", "scenes"),
    ("importers.command", "import_cmd"),
    ("ingest.command", "ingest"),
    ("mine.command", "mine"),
    ("label.command", "label"),
    ("curate.command", "tag"),
    ("curate.command", "find"),
    ("curate.command", "export"),
    ("audit.command", "audit"),
    ("demo", "demo"),
    ("bench", "bench"),
    ("provenance", "provenance_cmd"),
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
            for line in (e.lines() if hasattr(e, "lines") else [str(e)]):
                print(f"error: {line}", file=sys.stderr)
            raise typer.Exit(2) from None
    return wrapper


def _plain_arguments() -> None:
    """Arguments read as in any Unix tool's help: ``LIBRARY CAPTURE...`` in the usage line and the argument
    list, without typer's ``{...}`` braces and ``<path>`` type tags (an argument's metavar already says it)."""
    from typer.core import TyperArgument

    def name(self) -> str:
        return (self.metavar or self.name.upper()) + ("..." if self.nargs != 1 else "")

    TyperArgument._usage_display_name = lambda self: name(self) if self.required else f"[{name(self)}]"
    TyperArgument._rich_display_name = name
    TyperArgument.display_type_rich = lambda self, ctx: None

    # an option without a metavar shows a plain placeholder (``--seed N``, ``--json PATH``), never ``<int range>``
    from typer.core import TyperOption
    typed = TyperOption.display_type_rich
    plain = {"int": "N", "float": "X", "path": "PATH", "str": "TEXT"}

    def option_type(self, ctx) -> str:
        if self.metavar:
            return self.metavar
        t = typed(self, ctx).strip("<>").removesuffix(" range")
        return plain.get(t, t.upper())

    TyperOption.display_type_rich = option_type


def _register() -> None:
    for mod, name in COMMANDS:
        module = importlib.import_module(f"protomine.{mod}")
        fn = getattr(module, name)
        # the whole first line of the docstring in the command list (click would cut it at ~45 characters)
        short = (fn.__doc__ or "").strip().split("\n")[0].rstrip(".")
        app.command(name=name.removesuffix("_cmd"), short_help=short)(guarded(fn))


_plain_arguments()
_register()


def main() -> None:
    app()


if __name__ == "__main__":  # python -m protomine.cli
    main()
