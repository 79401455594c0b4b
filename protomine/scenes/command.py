"""``protomine scenes``: render the built-in demo scenario (captures + truth files) into a folder."""
from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from ..cliutil import ConfigOpt, Progress, QuietOpt, config_from
from .scenario import generate_scenario


def scenes(
    out: Annotated[Path, typer.Argument(help="Output folder (created); captures and truth CSVs go here.")],
    captures: Annotated[int, typer.Option(min=1, max=10000, help="Mining captures (a ring of cameras each).")] = 12,
    single: Annotated[int, typer.Option(min=0, max=10000, help="Single-frame captures (new instances, incl. held-out classes).")] = 24,
    frames: Annotated[int, typer.Option(min=1, max=360, help="Camera poses per mining capture.")] = 8,
    width: Annotated[int, typer.Option(min=16, max=4096, help="Image width (pixels).")] = 320,
    height: Annotated[int, typer.Option(min=16, max=4096, help="Image height (pixels).")] = 240,
    seed: Annotated[int, typer.Option("--seed", min=0, help="Random seed; same seed gives the same scenario.")] = 0,
    config: ConfigOpt = None,
    quiet: QuietOpt = False,
) -> None:
    """Render the demo scenario: mining captures, single-frame captures and truth files beside them.

    The config's [scenes] table picks the item-class family and the share of tumbled instances."""
    sc = config_from(config)["scenes"]
    progress = Progress("scenes", quiet)
    summary = generate_scenario(out, n_mining=captures, n_single=single, frames=frames, width=width,
                                height=height, seed=seed, family=sc["family"],
                                tumbled_fraction=sc["tumbled_fraction"], progress=progress)
    progress(f"done: {summary['objects']} objects in {len(summary['mining'])} mining + {len(summary['single'])} "
             f"single captures, {summary['render_seconds_per_frame']:.2f}s render per frame")
