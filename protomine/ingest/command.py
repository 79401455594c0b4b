"""`protomine ingest`: captures -> object store."""
from __future__ import annotations

from pathlib import Path
from typing import Annotated

import numpy as np
import typer

from ..atomic import clean_stale_temporaries
from ..cliutil import CapturesArg, ConfigOpt, QuietOpt, SeedOpt, VerboseOpt, config_from, reporter
from ..scale.options import SchedulerOpt, WorkersOpt, executor_for


def ingest(
    captures: CapturesArg,
    out: Annotated[Path, typer.Option("--out", "-o", metavar="STORE.h5", show_default=False,
                                      help="HDF5 object store to create or update.")],
    no_masks: Annotated[bool, typer.Option("--no-masks", help="Ignore masks/ and find objects from geometry alone.")] = False,
    keep_going: Annotated[bool, typer.Option("--keep-going", help="Skip bad or empty captures (listed at the end), "
                                             "write the store for the rest and exit with code 3.")] = False,
    config: ConfigOpt = None,
    seed: SeedOpt = 0,
    quiet: QuietOpt = False,
    verbose: VerboseOpt = False,
    scheduler: SchedulerOpt = None,
    workers: WorkersOpt = None,
) -> None:
    """Find the objects in each CAPTURE and lift each into an object-centric volume in the store.

    Every capture is checked before any work starts; all bad ones are listed.  Captures are lifted in
    parallel on this machine's cores (--workers, default auto) into one store; with --scheduler they are
    lifted on the cluster into a sharded store.
    """
    from ..scale.executor import DaskExecutor
    from .pipeline import check_captures, ingest_captures
    from .sharded import ingest_sharded
    from .store import is_index
    cfg = config_from(config)
    say = reporter("ingest", quiet, verbose)
    good, bad = check_captures(captures, keep_going=keep_going)
    clean_stale_temporaries(out.parent)
    with executor_for(cfg, scheduler, workers, processes=True, items=len(good)) as ex:
        if not isinstance(ex, DaskExecutor) and not is_index(out):
            res = ingest_captures(good, out, cfg, seed=seed, use_masks=not no_masks, progress=say,
                                  keep_going=keep_going, executor=ex)
        else:
            res = ingest_sharded(good, out, cfg, executor=ex, seed=seed, use_masks=not no_masks, progress=say,
                                 keep_going=keep_going)
    skipped = bad + res.get("skipped", [])
    if res["captures"]:
        res_ = np.array([c["plane_residual_m"] for c in res["captures"]]) * 1000
        typer.echo(f"ingested {res['objects']} objects from {len(res['captures'])} captures "
                   f"({res['frames']} frames, {res['frames_per_second']:.1f} frames/s); plane residual "
                   f"median {np.median(res_):.2f} mm, max {res_.max():.2f} mm; store {out}: "
                   f"{res['store']['kept']} kept, {res['store']['replaced']} replaced, {res['store']['added']} added")
    if skipped:
        for path, why in skipped:
            typer.echo(f"skipped: {path}: {why}", err=True)
        typer.echo(f"error: {len(skipped)} of {len(captures)} captures skipped (--keep-going); "
                   + ("the store holds the others" if res["captures"] else "nothing was written"), err=True)
        raise typer.Exit(3)
