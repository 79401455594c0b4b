"""`protomine mine`: object store -> prototype library (+ assignments.csv, gallery.png, members/ beside it)."""
from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import typer

from ..atomic import clean_stale_temporaries
from ..cliutil import ConfigOpt, QuietOpt, SeedOpt, VerboseOpt, config_from, existing, reporter
from ..scale.options import SchedulerOpt, WorkersOpt, executor_for


def mine(
    store: Annotated[Path, typer.Argument(metavar="STORE.h5", show_default=False,
                                          help="HDF5 object store written by `protomine ingest`.")],
    out: Annotated[Path, typer.Option("--out", "-o", metavar="LIBRARY.h5", show_default=False,
                                      help="HDF5 prototype library to write; assignments.csv, gallery.png and "
                                      "members/ (one sheet of member crops per cluster) go beside it.")],
    clusters: Annotated[Optional[int], typer.Option("--clusters", "-k", min=1, metavar="K",
                                                    help="Number of prototypes (default: chosen automatically).")] = None,
    config: ConfigOpt = None,
    seed: SeedOpt = 0,
    quiet: QuietOpt = False,
    verbose: VerboseOpt = False,
    scheduler: SchedulerOpt = None,
    workers: WorkersOpt = None,
) -> None:
    """Group the store's objects into pose-aware prototypes.

    With --scheduler or --workers > 1 the clustering passes run as a map-reduce over chunks of objects.
    """
    from ..scale.executor import InlineExecutor
    from .pipeline import mine_store
    cfg = config_from(config)
    clean_stale_temporaries(out.parent)
    with executor_for(cfg, scheduler, workers) as ex:
        lib, info = mine_store(existing(store, "object store"), out, cfg, seed=seed, n_clusters=clusters,
                               progress=reporter("mine", quiet, verbose),
                               executor=None if isinstance(ex, InlineExecutor) else ex)
    for notice in info["notices"]:
        typer.echo(f"notice: {notice}", err=True)
    where = out.parent
    typer.echo(f"mined {len(lib.members['object'])} objects into {info['K']} prototypes "
               f"({info['iterations']} iterations); library {out}; {where / 'assignments.csv'}; "
               f"{where / 'gallery.png'}; member sheets in {where / 'members'}")
