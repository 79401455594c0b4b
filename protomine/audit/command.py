"""`protomine audit`: prototype library + held-out truth CSV -> report folder (JSON, PNGs, one HTML file)."""
from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import typer

from ..cliutil import ConfigOpt, LibraryArg, QuietOpt, SeedOpt, VerboseOpt, config_from, existing, reporter


def audit(
    library: LibraryArg,
    truth: Annotated[Path, typer.Argument(metavar="TRUTH.csv", show_default=False,
                                          help="Held-out labels CSV: object,label[,yaw_deg] or capture,x,y,z,label[,yaw_deg].")],
    out: Annotated[Path, typer.Option("--out", "-o", metavar="DIR", show_default=False,
                                      help="Report folder (report.html, report.json, PNGs).")],
    store: Annotated[Optional[Path], typer.Option("--store", "-s", metavar="STORE.h5",
                                                  help="Object store; default: the one recorded in the library.")] = None,
    config: ConfigOpt = None,
    seed: SeedOpt = 0,
    quiet: QuietOpt = False,
    verbose: VerboseOpt = False,
) -> None:
    """Measure how pure the mined clusters are against a few hand labels, with honest uncertainty."""
    from .run import run_audit, summary_line
    cfg = config_from(config)
    doc = run_audit(existing(library, "library"), truth, out, cfg, store=store, seed=seed,
                    progress=reporter("audit", quiet, verbose))
    typer.echo(summary_line(doc, out))
