"""`protomine ingest`: captures -> object store."""
from __future__ import annotations

from pathlib import Path
from typing import Annotated

import numpy as np
import typer

from ..atomic import clean_stale_temporaries
from ..cliutil import ConfigOpt, Progress, QuietOpt, SeedOpt, config_from
from ..scale.options import SchedulerOpt, WorkersOpt, executor_for


def ingest(
    captures: Annotated[list[Path], typer.Argument(help="Capture folders (protomine.capture/1).")],
    store: Annotated[Path, typer.Option("--store", "-s", help="HDF5 object store to create or update.")],
    no_masks: Annotated[bool, typer.Option("--no-masks", help="Ignore masks/ and find objects from geometry alone.")] = False,
    config: ConfigOpt = None,
    seed: SeedOpt = 0,
    quiet: QuietOpt = False,
    scheduler: SchedulerOpt = None,
    workers: WorkersOpt = None,
) -> None:
    """Find the objects in CAPTURES and lift each into an object-centric volume in the store.

    Captures are lifted in parallel on this machine's cores (--workers, default auto); with --scheduler
    they are lifted on the cluster into a sharded store.
    """
    from ..scale.executor import DaskExecutor
    from .pipeline import ingest_captures
    from .sharded import ingest_sharded
    from .store import is_index
    cfg = config_from(config)
    clean_stale_temporaries(store.parent)
    with executor_for(cfg, scheduler, workers, processes=True, items=len(captures)) as ex:
        if not isinstance(ex, DaskExecutor) and not is_index(store):
            res = ingest_captures(captures, store, cfg, seed=seed, use_masks=not no_masks, progress=Progress("ingest", quiet),
                                  executor=ex)
        else:
            res = ingest_sharded(captures, store, cfg, executor=ex, seed=seed, use_masks=not no_masks,
                                 progress=Progress("ingest", quiet))
    res_ = np.array([c["plane_residual_m"] for c in res["captures"]]) * 1000
    typer.echo(f"ingested {res['objects']} objects from {len(res['captures'])} captures "
               f"({res['frames']} frames, {res['frames_per_second']:.1f} frames/s); plane residual "
               f"median {np.median(res_):.2f} mm, max {res_.max():.2f} mm; store {store}: "
               f"{res['store']['kept']} kept, {res['store']['replaced']} replaced, {res['store']['added']} added")
