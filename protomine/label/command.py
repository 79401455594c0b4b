"""`protomine label`: library + captures -> one JSON line per object per frame (+ optional overlay PNGs)."""
from __future__ import annotations

import json
from pathlib import Path
from typing import Annotated, Optional

import typer

from ..cliutil import ConfigOpt, Progress, QuietOpt, SeedOpt, config_from, existing
from ..scale.options import WorkersOpt, executor_for


def label(
    library: Annotated[Path, typer.Argument(help="HDF5 prototype library (protomine mine).")],
    captures: Annotated[list[Path], typer.Argument(help="Capture folders; every frame is labelled on its own.")],
    out: Annotated[Path, typer.Option("--out", "-o", help="JSON lines file to write (one object per frame per line).")],
    overlays: Annotated[Optional[Path], typer.Option("--overlays", help="Folder for one overlay PNG per frame.")] = None,
    no_masks: Annotated[bool, typer.Option("--no-masks", help="Ignore masks/ and find objects from geometry alone.")] = False,
    config: ConfigOpt = None,
    seed: SeedOpt = 0,
    quiet: QuietOpt = False,
    workers: WorkersOpt = None,
) -> None:
    """Name the objects of each frame from the library's prototypes, with yaw, scale and an open-set score."""
    from ..atomic import clean_stale_temporaries, write_text
    from ..capture import read_capture
    from ..mine.library import read_library
    from ..provenance import file_fingerprint, folder_fingerprint, provenance
    from .matcher import label_captures
    from .overlays import write_overlays

    cfg = config_from(config)
    say = Progress("label", quiet)
    lib = read_library(existing(library, "library"))
    caps = [read_capture(c, check_images=False) for c in captures]
    clean_stale_temporaries(out.parent)
    stats: dict = {}
    with executor_for(cfg, None, workers, processes=True, items=len(captures)) as ex:
        records = label_captures(lib, captures, cfg, seed=seed, use_masks=not no_masks, progress=say, stats=stats,
                                 executor=ex)
    prov = provenance(cfg, seed, {"library": file_fingerprint(library), **{c.name: folder_fingerprint(c.path) for c in caps}},
                      command="label")
    write_text(out, "".join(json.dumps(r) + "\n" for r in records))
    write_text(out.with_name(out.name + ".provenance.json"), json.dumps({"provenance": prov}, indent=1))
    if overlays is not None:
        for c in caps:
            write_overlays(overlays, c, records)
            say(f"{c.name}: overlays written")
    n_unknown = sum(r["unknown"] for r in records)
    typer.echo(f"labelled {len(records)} objects in {stats['frames']} frames of {len(caps)} captures "
               f"({n_unknown} unknown; {stats['objects_per_second']:.1f} objects/s lifting + matching); {out}"
               + (f"; overlays in {overlays}" if overlays is not None else ""))
