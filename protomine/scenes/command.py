"""``protomine scenes``: render the built-in demo scenario (captures + truth files) into a folder."""
from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from ..cliutil import ConfigOpt, QuietOpt, SeedOpt, VerboseOpt, config_from, reporter
from .scenario import generate_scenario, held_out_setting


def scenes(
    out: Annotated[Path, typer.Option("--out", "-o", metavar="DIR", show_default=False,
                                      help="Output folder (created): one capture folder each, truth CSVs beside them.")],
    captures: Annotated[int, typer.Option(min=1, max=10000, metavar="N", help="Mining captures (a ring of cameras each).")] = 12,
    single: Annotated[int, typer.Option(min=0, max=10000, metavar="N", help="Single-frame captures (new instances, incl. held-out classes).")] = 24,
    frames: Annotated[int, typer.Option(min=1, max=360, metavar="N", help="Camera poses per mining capture.")] = 8,
    width: Annotated[int, typer.Option(min=16, max=4096, metavar="PX", help="Image width (pixels).")] = 320,
    height: Annotated[int, typer.Option(min=16, max=4096, metavar="PX", help="Image height (pixels).")] = 240,
    config: ConfigOpt = None,
    seed: SeedOpt = 0,
    quiet: QuietOpt = False,
    verbose: VerboseOpt = False,
) -> None:
    """Render the demo scenario: mining captures, single-frame captures and truth files beside them.

    The config's [scenes] table picks the item-class family (and which of its classes are never mined), the share
    of tumbled instances and the share of captures with active-stereo depth."""
    sc = config_from(config)["scenes"]
    progress = reporter("scenes", quiet, verbose)
    summary = generate_scenario(out, n_mining=captures, n_single=single, frames=frames, width=width,
                                height=height, seed=seed, family=sc["family"],
                                tumbled_fraction=sc["tumbled_fraction"], touching=sc["touching"],
                                stereo_fraction=sc["stereo_fraction"], progress=progress, held_out=held_out_setting(sc))
    typer.echo(f"rendered {summary['objects']} objects in {len(summary['mining'])} mining + {len(summary['single'])} "
               f"single captures ({summary['render_seconds_per_frame']:.2f} s per frame) into {out}")
