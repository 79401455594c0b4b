"""`protomine label`: library + captures -> one JSON line per object per frame (+ optional overlay PNGs)."""
from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import typer

from ..cliutil import (CapturesArg, ConfigOpt, LibraryArg, QuietOpt, SeedOpt, VerboseOpt, config_from, existing,
                       notice_library_config, reporter)
from ..scale.options import WorkersOpt, executor_for


def label(
    library: LibraryArg,
    captures: CapturesArg,
    out: Annotated[Path, typer.Option("--out", "-o", metavar="LABELS.jsonl", show_default=False,
                                      help="JSON lines file to write: one label record per object per frame.")],
    overlays: Annotated[Optional[Path], typer.Option("--overlays", metavar="DIR",
                                                     help="Also draw one overlay PNG per frame into DIR.")] = None,
    no_masks: Annotated[bool, typer.Option("--no-masks", help="Ignore masks/ and find objects from geometry alone.")] = False,
    config: ConfigOpt = None,
    seed: SeedOpt = 0,
    quiet: QuietOpt = False,
    verbose: VerboseOpt = False,
    workers: WorkersOpt = None,
) -> None:
    """Name the objects of each frame from the library's prototypes, with yaw, scale and a score.

    \b
    The cluster is the prototype nearest by pose-searched distance (the rule mining assigns by).
    The score judges that match: a tail probability calibrated per cluster, the fraction of the
    cluster's own single views expected to fit worse than this object.  A typical member scores
    about 0.5, a clear misfit near 0.  Below the library's unknown cut (set at mining so that at most
    [mine] unknown_alpha, default 5 %, of held-out views of mined classes fall below it) the object
    is "unknown".  Alternatives are listed in
    the same order as the decision (by distance), each with its distance and score.  A farther
    cluster can score higher than the chosen one: a loose cluster accepts distances that a tight
    one calls unusual, so scores rank how typical a fit is, not which cluster is nearest.
    """
    from ..atomic import clean_stale_temporaries
    from ..capture import read_capture
    from ..ingest.pipeline import check_captures
    from ..mine.library import read_library
    from ..provenance import file_fingerprint, folder_fingerprint, provenance
    from .matcher import label_captures
    from ..records import write_records
    from .overlays import write_overlays

    cfg = config_from(config)
    say = reporter("label", quiet, verbose)
    lib = read_library(existing(library, "library"))
    notice_library_config(lib, config, cfg, say)
    check_captures(captures)            # every bad capture listed before any work
    caps = [read_capture(c, check_images=False) for c in captures]
    clean_stale_temporaries(out.parent)
    stats: dict = {}
    with executor_for(cfg, None, workers, processes=True, items=len(captures)) as ex:
        records = label_captures(lib, captures, cfg, seed=seed, use_masks=not no_masks, progress=say, stats=stats,
                                 executor=ex)
    prov = provenance(cfg, seed, {"library": file_fingerprint(library), **{c.name: folder_fingerprint(c.path) for c in caps}},
                      command="label")
    write_records(out, records, prov)
    if overlays is not None:
        write_overlays(overlays, caps, records, prov, progress=say)
    n_unknown = sum(r["unknown"] for r in records)
    typer.echo(f"labelled {len(records)} objects in {stats['frames']} frames of {len(caps)} captures "
               f"({n_unknown} unknown; {stats['objects_per_second']:.1f} objects/s lifting + matching); {out}"
               + (f"; overlays in {overlays}" if overlays is not None else ""))
