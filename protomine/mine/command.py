"""`protomine mine`: object store -> prototype library, assignments.csv, gallery.png."""
from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import typer

from ..atomic import clean_stale_temporaries
from ..cliutil import ConfigOpt, Progress, QuietOpt, SeedOpt, config_from
from ..scale.options import SchedulerOpt, WorkersOpt, executor_for


def mine(
    store: Annotated[Path, typer.Argument(help="HDF5 object store written by `protomine ingest`.")],
    library: Annotated[Path, typer.Option("--library", "-l", help="HDF5 prototype library to write.")],
    clusters: Annotated[Optional[int], typer.Option("--clusters", "-k", min=1, help="Number of prototypes (default: chosen automatically).")] = None,
    out: Annotated[Optional[Path], typer.Option("--out", help="Folder for assignments.csv and gallery.png (default: beside the library).")] = None,
    config: ConfigOpt = None,
    seed: SeedOpt = 0,
    quiet: QuietOpt = False,
    scheduler: SchedulerOpt = None,
    workers: WorkersOpt = None,
) -> None:
    """Group the store's objects into pose-aware prototypes.

    With --scheduler or --workers > 1 the clustering passes run as a map-reduce over chunks of objects.
    """
    from ..scale.executor import InlineExecutor
    from .pipeline import mine_store
    cfg = config_from(config)
    for folder in {library.parent, out or library.parent}:
        clean_stale_temporaries(folder)
    with executor_for(cfg, scheduler, workers) as ex:
        lib, info = mine_store(store, library, cfg, seed=seed, n_clusters=clusters, out_dir=out,
                               progress=Progress("mine", quiet),
                               executor=None if isinstance(ex, InlineExecutor) else ex)
    where = out or library.parent
    typer.echo(f"mined {len(lib.members['object'])} objects into {info['K']} prototypes "
               f"({info['iterations']} iterations); library {library}; {where / 'assignments.csv'}; {where / 'gallery.png'}")
