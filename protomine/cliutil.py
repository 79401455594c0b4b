"""Shared pieces of the command-line layer: common options, progress and the error guard."""
from __future__ import annotations

import sys
import time
from pathlib import Path
from typing import Annotated, Optional

import typer

from .config import load_config

ConfigOpt = Annotated[Optional[str], typer.Option("--config", "-c", help="Preset name (default, fast, fine) or TOML file.")]
SeedOpt = Annotated[int, typer.Option("--seed", min=0, help="Random seed; same inputs, config and seed give the same result.")]
QuietOpt = Annotated[bool, typer.Option("--quiet", "-q", help="No progress lines.")]


def config_from(config: str | None) -> dict:
    return load_config(config)


class Progress:
    """Progress lines on stderr: ``[stage] message`` with elapsed seconds."""

    def __init__(self, stage: str, quiet: bool = False):
        self.stage, self.quiet, self.t0 = stage, quiet, time.monotonic()

    def __call__(self, msg: str) -> None:
        if not self.quiet:
            print(f"[{self.stage} {time.monotonic() - self.t0:6.1f}s] {msg}", file=sys.stderr, flush=True)


def existing(path: Path, what: str = "file") -> Path:
    from .errors import InputError
    if not Path(path).exists():
        raise InputError(path, None, f"{what} not found")
    return Path(path)
