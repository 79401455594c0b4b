"""Shared pieces of the command-line layer: the one option grammar, and the progress reporter.

Grammar (every command follows it; DEVELOPERS.md "Command line"):
- inputs are positional arguments (capture folders last, so shell globs work everywhere);
- ``-o/--out`` is always the command's main output (a file or a folder, named in its help);
- short flags have one meaning across commands: ``-o`` out, ``-c`` config, ``-q`` quiet, ``-v`` verbose,
  ``-k`` number of clusters, ``-n`` name, ``-e`` example, ``-s`` object store (an input);
- a command only takes options it uses (``--seed`` only where randomness enters).
"""
from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import typer

from .config import load_config
from .errors import InputError
from .progress import Progress

ConfigOpt = Annotated[Optional[str], typer.Option(
    "--config", "-c", metavar="PRESET|FILE", help="Preset name (default, fast, fine, stereo) or TOML file.")]
SeedOpt = Annotated[int, typer.Option(
    "--seed", min=0, metavar="N", help="Random seed; same inputs, config and seed give the same result.")]
QuietOpt = Annotated[bool, typer.Option("--quiet", "-q", help="No progress output (for scripts); results and errors only.")]
VerboseOpt = Annotated[bool, typer.Option("--verbose", "-v", help="Also one line per frame / item as it is processed.")]
CapturesArg = Annotated[list[Path], typer.Argument(
    metavar="CAPTURE", show_default=False, help="Capture folders (protomine.capture/1); shell globs work.")]
LibraryArg = Annotated[Path, typer.Argument(metavar="LIBRARY", show_default=False,
                                            help="HDF5 prototype library (protomine mine).")]


def config_from(config: str | None) -> dict:
    return load_config(config)


def reporter(stage: str, quiet: bool = False, verbose: bool = False) -> Progress:
    """The progress reporter of one command (bars on a terminal, plain lines otherwise)."""
    return Progress(stage, quiet, verbose=verbose)


def existing(path: Path, what: str = "file") -> Path:
    if not Path(path).exists():
        raise InputError(path, None, f"{what} not found")
    return Path(path)


def notice_library_config(library, config: str | None, cfg: dict, say) -> None:
    """Print a notice when an explicit ``--config`` asks for lifting settings other than the library's.

    Matching must lift single views exactly as the mined objects were lifted, so the library's own grid and
    channel weights are used; a user who passed ``--config fine`` for a library mined with ``default``
    is told so instead of getting it silently.
    """
    if not config:
        return
    diffs = library_config_differences(library.config, cfg)
    if diffs:
        typer.echo(f"notice: {library.path} was mined with {', '.join(diffs)}; --config {config} differs there, "
                   "so the library's settings are used for lifting and matching", err=True)


def library_config_differences(lib_cfg: dict, cfg: dict) -> list[str]:
    """``key=value`` of the library config where ``cfg`` differs in a key that fixes how objects are matched."""
    keys = [("volume", k) for k in lib_cfg.get("volume", {})] + \
           [("mine", k) for k in ("free_weight", "colour_weight", "scales")]
    out = []
    for sec, k in keys:
        a, b = lib_cfg.get(sec, {}).get(k), cfg.get(sec, {}).get(k)
        if a is not None and a != b:
            out.append(f"{sec}.{k}={a}")
    return out
